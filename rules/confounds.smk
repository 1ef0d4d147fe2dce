rule select_confounds:
    input:
        confounds=confounds_file,
        bold=bold_file,
    output:
        confounds=RUN_DIR + "/confounds.tsv",
        summary=RUN_DIR + "/confounds.json",
        figure=RUN_DIR + "/confounds.png",
    params:
        settings=confounds_params(),
    log:
        LOG_DIR + "/sub-{subject}/{run_id}/select_confounds.log",
    shell:
        step_command("select_confounds")
