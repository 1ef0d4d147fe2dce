# Fixed-effects combination of a subject's runs (t contrasts only).
rule combine_runs:
    input:
        effect=run_effects,
        variance=run_variances,
    output:
        effect=SUBJECT_DIR + "/contrast-{tcon}/effect.nii.gz",
        variance=SUBJECT_DIR + "/contrast-{tcon}/variance.nii.gz",
        t=SUBJECT_DIR + "/contrast-{tcon}/t.nii.gz",
        z=SUBJECT_DIR + "/contrast-{tcon}/z.nii.gz",
        p=SUBJECT_DIR + "/contrast-{tcon}/p.nii.gz",
    params:
        settings=combine_params,
    group:
        "subject_{subject}"
    log:
        LOG_DIR + "/sub-{subject}/combined/contrast-{tcon}.log",
    script:
        "../scripts/combine_runs.py"
