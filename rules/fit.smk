rule fit:
    input:
        bold=bold_file,
        mask=mask_file,
        tissue=tissue_file,
        design=f"{RUN_DIR}/design.tsv",
        design_summary=f"{RUN_DIR}/design.json",
    output:
        fit=f"{RUN_DIR}/fit.h5",
        mean=f"{RUN_DIR}/mean.nii.gz",
        residual_sd=f"{RUN_DIR}/residual_sd.nii.gz",
        ar_coef=f"{RUN_DIR}/ar_coef.nii.gz",
    params:
        settings=fit_params(),
    # not in params: the fit does not depend on it (rules/common.smk: fit_params)
    threads: config["fit"]["threads"]
    resources:
        mem_mb=fit_mem_mb,
        runtime=30,
    log:
        f"{LOG_DIR}/sub-{{subject}}/{{run_id}}/fit.log",
    benchmark:
        f"{BENCHMARK_DIR}/sub-{{subject}}/{{run_id}}/fit.tsv"
    shell:
        heavy_step_command("fit")
