# Fixed-effects combination of a subject's runs, computed from the run fits: one job per
# subject and contrast, whether or not run-level maps are written. t contrasts give effect,
# variance, t, z, p; F contrasts the fixed-effects F over runs (f, z, p).
rule combine_runs:
    input:
        fit=subject_fits,
    output:
        effect=f"{SUBJECT_DIR}/contrast-{{contrast}}/effect.nii.gz",
        variance=f"{SUBJECT_DIR}/contrast-{{contrast}}/variance.nii.gz",
        t=f"{SUBJECT_DIR}/contrast-{{contrast}}/t.nii.gz",
        z=f"{SUBJECT_DIR}/contrast-{{contrast}}/z.nii.gz",
        p=f"{SUBJECT_DIR}/contrast-{{contrast}}/p.nii.gz",
    params:
        settings=contrast_params,
    wildcard_constraints:
        contrast=T_CONTRAST,
    group:
        "subject_{subject}"
    log:
        f"{LOG_DIR}/sub-{{subject}}/combined/contrast-{{contrast}}.log",
    shell:
        step_command("combine_runs")


use rule combine_runs as combine_runs_f with:
    output:
        f=f"{SUBJECT_DIR}/contrast-{{contrast}}/f.nii.gz",
        z=f"{SUBJECT_DIR}/contrast-{{contrast}}/z.nii.gz",
        p=f"{SUBJECT_DIR}/contrast-{{contrast}}/p.nii.gz",
    wildcard_constraints:
        contrast=F_CONTRAST,
