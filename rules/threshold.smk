# One job per map per threshold setting; outputs sit beside the map they threshold.
# One rule (threshold_run) reused for the subject and group levels: only the paths, the
# level's settings and the cluster-job group differ.
rule threshold_run:
    input:
        z=RUN_DIR + "/contrast-{contrast}/z.nii.gz",
        p=RUN_DIR + "/contrast-{contrast}/p.nii.gz",
        underlay=RUN_DIR + "/mean.nii.gz",
    output:
        thresholded=RUN_DIR + "/contrast-{contrast}/threshold-{threshold}/thresholded.nii.gz",
        mask=RUN_DIR + "/contrast-{contrast}/threshold-{threshold}/mask.nii.gz",
        clusters=RUN_DIR + "/contrast-{contrast}/threshold-{threshold}/clusters.tsv",
        figure=RUN_DIR + "/contrast-{contrast}/threshold-{threshold}/slices.png",
    params:
        settings=run_threshold_params,
    group:
        "subject_{subject}"
    log:
        LOG_DIR + "/sub-{subject}/{run_id}/contrast-{contrast}_threshold-{threshold}.log",
    shell:
        step_command("threshold")


use rule threshold_run as threshold_subject with:
    input:
        z=SUBJECT_DIR + "/contrast-{contrast}/z.nii.gz",
        p=SUBJECT_DIR + "/contrast-{contrast}/p.nii.gz",
        underlay=subject_underlay,
    output:
        thresholded=SUBJECT_DIR + "/contrast-{contrast}/threshold-{threshold}/thresholded.nii.gz",
        mask=SUBJECT_DIR + "/contrast-{contrast}/threshold-{threshold}/mask.nii.gz",
        clusters=SUBJECT_DIR + "/contrast-{contrast}/threshold-{threshold}/clusters.tsv",
        figure=SUBJECT_DIR + "/contrast-{contrast}/threshold-{threshold}/slices.png",
    params:
        settings=subject_threshold_params,
    log:
        LOG_DIR + "/sub-{subject}/combined/contrast-{contrast}_threshold-{threshold}.log",


# The group level's cluster job is its model's (the SLURM profile's `groups:` says the same).
use rule threshold_run as threshold_group with:
    input:
        z=GROUP_DIR + "/z.nii.gz",
        p=GROUP_DIR + "/p.nii.gz",
        underlay=group_underlay,
    output:
        thresholded=GROUP_DIR + "/threshold-{threshold}/thresholded.nii.gz",
        mask=GROUP_DIR + "/threshold-{threshold}/mask.nii.gz",
        clusters=GROUP_DIR + "/threshold-{threshold}/clusters.tsv",
        figure=GROUP_DIR + "/threshold-{threshold}/slices.png",
    params:
        settings=group_threshold_params,
    group:
        "model_{model}"
    log:
        LOG_DIR + "/group/model-{model}/contrast-{contrast}/{group_contrast}_threshold-{threshold}.log",
