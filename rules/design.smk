rule build_design:
    input:
        events=RUN_DIR + "/events.tsv",
        events_summary=RUN_DIR + "/events.json",
        confounds=RUN_DIR + "/confounds.tsv",
        confounds_summary=RUN_DIR + "/confounds.json",
    output:
        design=RUN_DIR + "/design.tsv",
        summary=RUN_DIR + "/design.json",
        figure=RUN_DIR + "/design.png",
        correlation_figure=RUN_DIR + "/design_correlation.png",
    params:
        settings=design_params(),
    log:
        LOG_DIR + "/sub-{subject}/{run_id}/build_design.log",
    shell:
        step_command("build_design")

