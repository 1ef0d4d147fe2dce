# The study report: results/report/index.html and one page per subject, in ONE job (figures
# are cached inside it by lineage hash, in folders Snakemake does not manage, so a rerun
# draws only the figures whose maps changed). It reads files the other steps wrote and
# draws a few figures, so on a cluster it runs on the submitting machine (no cluster job).
localrules:
    report,


rule report:
    input:
        unpack(report_inputs),
    output:
        study=f"{REPORT_DIR}/index.html",
        subject_pages=report_subject_pages(),
        qc_table=f"{REPORT_DIR}/qc_runs.tsv",
    params:
        settings=report_params(),
    log:
        f"{LOG_DIR}/report.log",
    script:
        "../scripts/report.py"
