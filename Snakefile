# glmsteps: task-fMRI GLM analysis as a cached, auditable Snakemake workflow.
# Wiring only; see DEVELOPERS.md. Run: snakemake --cores N [--configfile your.yaml]

from snakemake.utils import min_version

min_version("9.0")


# The toy study's config is the default; a --configfile given on the command line replaces
# it entirely (Snakemake would otherwise merge the two, mixing the toy contrasts into yours).
if not workflow.configfiles:

    configfile: workflow.source_path("config/config.yaml")


include: "rules/common.smk"


# the interpreter the jobs' shell commands name ("$GLMSTEPS_PYTHON"; set in rules/common.smk)
envvars:
    "GLMSTEPS_PYTHON",


include: "rules/events.smk"
include: "rules/confounds.smk"
include: "rules/design.smk"
include: "rules/fit.smk"
include: "rules/contrasts.smk"
include: "rules/combine.smk"
include: "rules/threshold.smk"
include: "rules/group.smk"
include: "rules/index.smk"
include: "rules/report.smk"


onstart:
    start_launcher()
    lift_local_rate_limit()


onsuccess:
    print_run_summary(OUT, RUN_STARTED, ok=True)


onerror:
    print_run_summary(OUT, RUN_STARTED, ok=False)


rule all:
    input:
        all_targets(),
    default_target: True
