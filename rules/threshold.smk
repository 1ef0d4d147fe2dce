# One job per map per threshold setting; outputs sit beside the map they threshold.
# One rule (threshold_run) reused for the subject and group levels: only the paths, the
# level's settings and the cluster-job group differ.
rule threshold_run:
    input:
        z=f"{RUN_DIR}/contrast-{{contrast}}/z.nii.gz",
        p=f"{RUN_DIR}/contrast-{{contrast}}/p.nii.gz",
        underlay=f"{RUN_DIR}/mean.nii.gz",
    output:
        thresholded=f"{RUN_DIR}/contrast-{{contrast}}/threshold-{{threshold}}/thresholded.nii.gz",
        mask=f"{RUN_DIR}/contrast-{{contrast}}/threshold-{{threshold}}/mask.nii.gz",
        clusters=f"{RUN_DIR}/contrast-{{contrast}}/threshold-{{threshold}}/clusters.tsv",
        figure=f"{RUN_DIR}/contrast-{{contrast}}/threshold-{{threshold}}/slices.png",
    params:
        settings=run_threshold_params,
    group:
        "subject_{subject}"
    log:
        f"{LOG_DIR}/sub-{{subject}}/{{run_id}}/contrast-{{contrast}}_threshold-{{threshold}}.log",
    shell:
        step_command("threshold")


use rule threshold_run as threshold_subject with:
    input:
        z=f"{SUBJECT_DIR}/contrast-{{contrast}}/z.nii.gz",
        p=f"{SUBJECT_DIR}/contrast-{{contrast}}/p.nii.gz",
        underlay=subject_underlay,
    output:
        thresholded=f"{SUBJECT_DIR}/contrast-{{contrast}}/threshold-{{threshold}}/thresholded.nii.gz",
        mask=f"{SUBJECT_DIR}/contrast-{{contrast}}/threshold-{{threshold}}/mask.nii.gz",
        clusters=f"{SUBJECT_DIR}/contrast-{{contrast}}/threshold-{{threshold}}/clusters.tsv",
        figure=f"{SUBJECT_DIR}/contrast-{{contrast}}/threshold-{{threshold}}/slices.png",
    params:
        settings=subject_threshold_params,
    log:
        f"{LOG_DIR}/sub-{{subject}}/combined/contrast-{{contrast}}_threshold-{{threshold}}.log",


# The group level's cluster job is its model's (the SLURM profile's `groups:` says the same).
use rule threshold_run as threshold_group with:
    input:
        z=f"{GROUP_DIR}/z.nii.gz",
        p=f"{GROUP_DIR}/p.nii.gz",
        underlay=group_underlay,
    output:
        thresholded=f"{GROUP_DIR}/threshold-{{threshold}}/thresholded.nii.gz",
        mask=f"{GROUP_DIR}/threshold-{{threshold}}/mask.nii.gz",
        clusters=f"{GROUP_DIR}/threshold-{{threshold}}/clusters.tsv",
        figure=f"{GROUP_DIR}/threshold-{{threshold}}/slices.png",
    params:
        settings=group_threshold_params,
    group:
        "model_{model}"
    log:
        f"{LOG_DIR}/group/model-{{model}}/contrast-{{contrast}}/{{group_contrast}}_threshold-{{threshold}}.log",
