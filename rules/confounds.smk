rule select_confounds:
    input:
        confounds=confounds_file,
        bold=bold_file,
    output:
        confounds=f"{RUN_DIR}/confounds.tsv",
        summary=f"{RUN_DIR}/confounds.json",
        figure=f"{RUN_DIR}/confounds.png",
    params:
        settings=confounds_params(),
    log:
        f"{LOG_DIR}/sub-{{subject}}/{{run_id}}/select_confounds.log",
    shell:
        step_command("select_confounds")
