# Group models over subjects' combined maps: one job per (model, first-level contrast,
# group contrast); permutation inference in its own job so that its settings rerun only it.
rule group_model:
    input:
        effect=subject_effects,
        variance=subject_variances,
        participants=participants_file(),
    output:
        effect=GROUP_DIR + "/effect.nii.gz",
        variance=GROUP_DIR + "/variance.nii.gz",
        t=GROUP_DIR + "/t.nii.gz",
        z=GROUP_DIR + "/z.nii.gz",
        p=GROUP_DIR + "/p.nii.gz",
        site_qc=GROUP_DIR + "/site_qc.json",
        site_figure=GROUP_DIR + "/site_qc.png",
    params:
        settings=group_model_params,
    wildcard_constraints:
        contrast=T_CONTRAST,
    resources:
        mem_mb=4000,
    log:
        LOG_DIR + "/group/model-{model}/contrast-{contrast}/{group_contrast}.log",
    benchmark:
        BENCHMARK_DIR + "/group/model-{model}/contrast-{contrast}/{group_contrast}.tsv"
    script:
        "../scripts/group_model.py"


rule group_permutation:
    input:
        effect=subject_effects,
        variance=subject_variances,
        participants=participants_file(),
    output:
        p_fwe=GROUP_DIR + "/p_fwe.nii.gz",
        p_fwe_cluster=GROUP_DIR + "/p_fwe_cluster.nii.gz",
        clusters=GROUP_DIR + "/permutation_clusters.tsv",
        p_fwe_tfce=GROUP_DIR + "/p_fwe_tfce.nii.gz",
    params:
        settings=group_permutation_params,
    wildcard_constraints:
        contrast=T_CONTRAST,
    threads: 2
    resources:
        mem_mb=4000,
        runtime=120,
    log:
        LOG_DIR + "/group/model-{model}/contrast-{contrast}/{group_contrast}_permutation.log",
    benchmark:
        BENCHMARK_DIR + "/group/model-{model}/contrast-{contrast}/{group_contrast}_permutation.tsv"
    script:
        "../scripts/group_permutation.py"
