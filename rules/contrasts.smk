rule contrast_t:
    input:
        fit=f"{RUN_DIR}/fit.h5",
    output:
        effect=f"{RUN_DIR}/contrast-{{contrast}}/effect.nii.gz",
        variance=f"{RUN_DIR}/contrast-{{contrast}}/variance.nii.gz",
        t=f"{RUN_DIR}/contrast-{{contrast}}/t.nii.gz",
        z=f"{RUN_DIR}/contrast-{{contrast}}/z.nii.gz",
        p=f"{RUN_DIR}/contrast-{{contrast}}/p.nii.gz",
    params:
        settings=contrast_params,
    wildcard_constraints:
        contrast=T_CONTRAST,
    group:
        "subject_{subject}"
    log:
        f"{LOG_DIR}/sub-{{subject}}/{{run_id}}/contrast-{{contrast}}.log",
    shell:
        step_command("contrast")


use rule contrast_t as contrast_f with:
    output:
        f=f"{RUN_DIR}/contrast-{{contrast}}/f.nii.gz",
        z=f"{RUN_DIR}/contrast-{{contrast}}/z.nii.gz",
        p=f"{RUN_DIR}/contrast-{{contrast}}/p.nii.gz",
    wildcard_constraints:
        contrast=F_CONTRAST,
