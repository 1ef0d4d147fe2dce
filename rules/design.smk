rule build_design:
    input:
        events=f"{RUN_DIR}/events.tsv",
        events_summary=f"{RUN_DIR}/events.json",
        confounds=f"{RUN_DIR}/confounds.tsv",
        confounds_summary=f"{RUN_DIR}/confounds.json",
    output:
        design=f"{RUN_DIR}/design.tsv",
        summary=f"{RUN_DIR}/design.json",
        figure=f"{RUN_DIR}/design.png",
        correlation_figure=f"{RUN_DIR}/design_correlation.png",
    params:
        settings=design_params(),
    log:
        f"{LOG_DIR}/sub-{{subject}}/{{run_id}}/build_design.log",
    shell:
        step_command("build_design")

