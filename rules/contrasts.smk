rule contrast_t:
    input:
        fit=RUN_DIR + "/fit.h5",
    output:
        effect=RUN_DIR + "/contrast-{tcon}/effect.nii.gz",
        variance=RUN_DIR + "/contrast-{tcon}/variance.nii.gz",
        t=RUN_DIR + "/contrast-{tcon}/t.nii.gz",
        z=RUN_DIR + "/contrast-{tcon}/z.nii.gz",
        p=RUN_DIR + "/contrast-{tcon}/p.nii.gz",
    params:
        settings=t_contrast_params,
    group:
        "subject_{subject}"
    log:
        LOG_DIR + "/sub-{subject}/{run_id}/contrast-{tcon}.log",
    script:
        "../scripts/contrast.py"


rule contrast_f:
    input:
        fit=RUN_DIR + "/fit.h5",
    output:
        f=RUN_DIR + "/contrast-{fcon}/f.nii.gz",
        z=RUN_DIR + "/contrast-{fcon}/z.nii.gz",
        p=RUN_DIR + "/contrast-{fcon}/p.nii.gz",
    params:
        settings=f_contrast_params,
    group:
        "subject_{subject}"
    log:
        LOG_DIR + "/sub-{subject}/{run_id}/contrast-{fcon}.log",
    script:
        "../scripts/contrast.py"
