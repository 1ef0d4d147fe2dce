# Group models over subjects' combined maps: one job per (model, first-level contrast,
# group contrast); permutation inference in its own job so that its settings rerun only it.
rule group_model:
    input:
        effect=subject_effects,
        variance=subject_variances,
        participants=participants_file(),
    output:
        effect=f"{GROUP_DIR}/effect.nii.gz",
        variance=f"{GROUP_DIR}/variance.nii.gz",
        t=f"{GROUP_DIR}/t.nii.gz",
        z=f"{GROUP_DIR}/z.nii.gz",
        p=f"{GROUP_DIR}/p.nii.gz",
        site_qc=f"{GROUP_DIR}/site_qc.json",
        site_figure=f"{GROUP_DIR}/site_qc.png",
    params:
        settings=group_model_params,
    wildcard_constraints:
        contrast=T_CONTRAST,
    resources:
        mem_mb=4000,
    log:
        f"{LOG_DIR}/group/model-{{model}}/contrast-{{contrast}}/{{group_contrast}}.log",
    benchmark:
        f"{BENCHMARK_DIR}/group/model-{{model}}/contrast-{{contrast}}/{{group_contrast}}.tsv"
    script:
        "../scripts/group_model.py"


rule group_permutation:
    input:
        effect=subject_effects,
        variance=subject_variances,
        participants=participants_file(),
    output:
        p_fwe=f"{GROUP_DIR}/p_fwe.nii.gz",
        p_fwe_cluster=f"{GROUP_DIR}/p_fwe_cluster.nii.gz",
        clusters=f"{GROUP_DIR}/permutation_clusters.tsv",
        p_fwe_tfce=f"{GROUP_DIR}/p_fwe_tfce.nii.gz",
    params:
        settings=group_permutation_params,
    wildcard_constraints:
        contrast=T_CONTRAST,
    threads: 2
    resources:
        mem_mb=4000,
        runtime=120,
    log:
        f"{LOG_DIR}/group/model-{{model}}/contrast-{{contrast}}/{{group_contrast}}_permutation.log",
    benchmark:
        f"{BENCHMARK_DIR}/group/model-{{model}}/contrast-{{contrast}}/{{group_contrast}}_permutation.tsv"
    script:
        "../scripts/group_permutation.py"
