rule validate_events:
    input:
        events=events_file,
        bold=bold_file,
        bold_sidecar=bold_sidecar_file,
    output:
        events=f"{RUN_DIR}/events.tsv",
        summary=f"{RUN_DIR}/events.json",
    params:
        settings=events_params(),
    log:
        f"{LOG_DIR}/sub-{{subject}}/{{run_id}}/validate_events.log",
    shell:
        step_command("validate_events")
