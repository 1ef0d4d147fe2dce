rule build_design:
    input:
        events=RUN_DIR + "/events.tsv",
        confounds=RUN_DIR + "/confounds.tsv",
        confounds_summary=RUN_DIR + "/confounds.json",
    output:
        design=RUN_DIR + "/design.tsv",
        summary=RUN_DIR + "/design.json",
        figure=RUN_DIR + "/design.png",
        correlation_figure=RUN_DIR + "/design_correlation.png",
    params:
        **design_params(),
    log:
        LOG_DIR + "/sub-{subject}/{run_id}/build_design.log",
    script:
        "../scripts/build_design.py"


# Per-contrast estimability and efficiency of each run's design. Kept apart from
# build_design so that adding a contrast reruns only this cheap report, never the fit.
rule design_contrasts:
    input:
        design=RUN_DIR + "/design.tsv",
        design_summary=RUN_DIR + "/design.json",
    output:
        report=RUN_DIR + "/design_contrasts.json",
    params:
        contrasts=all_contrast_definitions(),
    log:
        LOG_DIR + "/sub-{subject}/{run_id}/design_contrasts.log",
    script:
        "../scripts/design_contrasts.py"
