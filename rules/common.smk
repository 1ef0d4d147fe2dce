# Wiring: validate the config, discover the runs, and hand both to glmsteps/workflow_plan.py,
# which computes every target, input path and per-step params mapping (plain Python, unit-tested
# in tests/test_workflow_plan.py). The functions below adapt it to Snakemake's call signatures.

import os
import re
import sys
import time

from snakemake.exceptions import WorkflowError
from snakemake.utils import validate

from glmsteps import workflow_plan as plan
from glmsteps.bids import check_pattern, discover_runs
from glmsteps.errors import ConfigError, GlmstepsError
from glmsteps.launch import command_template, start_server
from glmsteps.precheck import check_config_contrasts, check_config_start
from glmsteps.renames import check_renamed
from glmsteps.report.summary import print_run_summary
from glmsteps.volumes import bids_sidecar_of

#: When this run started (the end-of-run summary counts the maps written since).
RUN_STARTED = time.time()
#: The interpreter of this run, for the jobs' shell commands: they name it as "$GLMSTEPS_PYTHON", so
#: the recorded code of a job does not depend on where the environment lives (results planned from
#: another venv, or from an installed wheel, are not rerun for that). Every Snakemake process that
#: runs jobs (also on a cluster node) parses this file and sets it.
os.environ["GLMSTEPS_PYTHON"] = sys.executable


def _config_error(message):
    """Stop the workflow with a one-line configuration error (no traceback)."""
    sys.stderr.write(f"glmsteps: ConfigError: {message}\n")
    raise SystemExit(1)


def _schema_error_line(exc):
    """Which key of the config breaks config/schema.yaml and how, in one line."""
    # Snakemake raises its WorkflowError while handling jsonschema's ValidationError
    for cause in (exc.__cause__, exc.__context__):
        path = getattr(cause, "absolute_path", None)
        if path is not None and hasattr(cause, "message"):
            key = ".".join(str(part) for part in path) or "(top level)"
            return f"config {key}: {cause.message}; config/schema.yaml lists every key with its bounds"
    return f"the config does not match config/schema.yaml ({str(exc).splitlines()[0]})"


try:
    # renamed keywords and old design column names first: the schema would only say "not one of"
    check_renamed(config)
except ConfigError as _exc:
    _config_error(str(_exc))

try:
    validate(config, workflow.source_path("../config/schema.yaml"), set_default=True)
except WorkflowError as _exc:
    _config_error(_schema_error_line(_exc))


def discovered_runs():
    """Runs found by matching the bold pattern on disk (file names only, no image is opened)."""
    inputs = config["inputs"]
    try:
        for key in ("bold", "events", "confounds", "mask") + (("tissue",) if inputs["tissue"] else ()):
            check_pattern(key, inputs[key])
        runs = discover_runs(inputs["root"], inputs["bold"])
    except ConfigError as exc:
        _config_error(str(exc))
    if inputs["subjects"]:
        runs = [r for r in runs if r.subject in set(inputs["subjects"])]
    if inputs["tasks"]:
        runs = [r for r in runs if r.task in set(inputs["tasks"])]
    if not runs:
        _config_error(f"no BOLD file under {inputs['root']} matches inputs.bold = {inputs['bold']!r}; "
                      "check inputs.root and the pattern")
    return runs


_DISCOVERED = tuple(discovered_runs())
try:
    plan.check_names(config)
except ConfigError as _exc:
    _config_error(str(_exc))

#: Paths and targets of this study (glmsteps/workflow_plan.py); the rules below only wire them in.
PLAN = plan.WorkflowPlan(config, _DISCOVERED)
OUT = PLAN.out
RUNS = PLAN.runs
SUBJECTS = PLAN.subjects
CONTRASTS = config["contrasts"]
T_CONTRASTS = PLAN.t_contrasts
F_CONTRASTS = PLAN.f_contrasts
THRESHOLDS = config["thresholds"]
GROUP_MODELS = config["group_models"]


if workflow.is_main_process:
    # contrast keys against the conditions of the events files, before any job (reads only the condition
    # column of each events TSV; cluster jobs re-parsing this file skip it)
    try:
        check_config_start(config, config_files=workflow.configfiles)  # names, output_dir, repeated keys
        check_config_contrasts(config, PLAN.events_files())
    except GlmstepsError as _exc:
        sys.stderr.write(f"glmsteps: {type(_exc).__name__}: {_exc}\n")
        raise SystemExit(1)


def _alternation(names):
    """Regex that matches exactly one of ``names`` (never matches when empty)."""
    return "|".join(re.escape(n) for n in names) if names else "(?!x)x"


wildcard_constraints:
    subject="[A-Za-z0-9]+",
    run_id="(ses-[A-Za-z0-9]+_)?task-[A-Za-z0-9]+_run-[A-Za-z0-9]+",
    contrast=_alternation(list(CONTRASTS)),
    threshold="[A-Za-z0-9_]+",
    model="[A-Za-z0-9_]+",
    group_contrast="[A-Za-z0-9_]+",

#: Wildcard constraints for the rules that only make sense for t (or F) contrasts.
T_CONTRAST = _alternation(T_CONTRASTS)
F_CONTRAST = _alternation(F_CONTRASTS)


# ---------------------------------------------------------------- paths
RUN_DIR = f"{OUT}/sub-{{subject}}/{{run_id}}"
SUBJECT_DIR = f"{OUT}/sub-{{subject}}/combined"
GROUP_DIR = f"{OUT}/group/model-{{model}}/contrast-{{contrast}}/{{group_contrast}}"
LOG_DIR = f"{OUT}/logs"
#: Snakemake's benchmark files (wall time, memory, CPU) of the heavy steps.
BENCHMARK_DIR = f"{OUT}/benchmarks"
REPORT_DIR = PLAN.report_dir()


def bold_file(wildcards):
    """Raw BOLD NIfTI of a run."""
    return PLAN.raw_file("bold", wildcards.subject, wildcards.run_id)


def events_file(wildcards):
    """Raw events TSV of a run."""
    return PLAN.raw_file("events", wildcards.subject, wildcards.run_id)


def confounds_file(wildcards):
    """Raw confounds TSV of a run."""
    return PLAN.raw_file("confounds", wildcards.subject, wildcards.run_id)


def bold_sidecar_file(wildcards):
    """The BOLD's BIDS JSON sidecar (RepetitionTime, SliceTiming) when the run has one, else nothing.

    An input of validate_events, so that editing it reruns the run's chain.
    """
    side = bids_sidecar_of(bold_file(wildcards))
    return [str(side)] if side.exists() else []


def mask_file(wildcards):
    """Mask NIfTI of a run."""
    return PLAN.raw_file("mask", wildcards.subject, wildcards.run_id)


def tissue_file(wildcards):
    """Tissue label map of a run (inputs.tissue), or no file when the config has none."""
    return [PLAN.raw_file("tissue", wildcards.subject, wildcards.run_id)] if config["inputs"]["tissue"] else []


def participants_file():
    """The BIDS participants table."""
    return PLAN.participants_file()


def subject_fits(wildcards):
    """A subject's run fits (fit.h5), in run order."""
    return PLAN.subject_fits(wildcards.subject)


def subject_underlay(wildcards):
    """Mean image of a subject's first run (figure underlay)."""
    return PLAN.subject_underlay(wildcards.subject)


def group_underlay(wildcards):
    """Mean image of the first subject's first run (all subjects share one grid)."""
    return PLAN.group_underlay()


def subject_effects(wildcards):
    return PLAN.subject_maps(wildcards.contrast, "effect")


def subject_variances(wildcards):
    return PLAN.subject_maps(wildcards.contrast, "variance")


# ---------------------------------------------------------------- how jobs run
def start_launcher():
    """Warm the light steps' launcher as the run starts (see glmsteps/launch.py)."""
    start_server()


def lift_local_rate_limit():
    """Turn Snakemake's job rate limiter off for a local run (called as the run starts).

    The limiter (``--max-jobs-per-timespan``, 100 a second by default) re-runs the scheduler
    on a 1 s timer after every scheduling pass, and each such pass starts the next timer: every
    job that finishes starts one more chain, so on a local run the passes grow with the jobs
    finished (7,306 passes for the toy study's 350 jobs; with the limiter off, 12 s less CPU and
    5 s less wall time on the toy study). A local run needs no submission limit; a cluster run
    keeps it. Relies on Snakemake's scheduler attribute (checked, so a newer Snakemake without it
    just keeps its limiter).
    """
    scheduler = getattr(workflow, "scheduler", None)
    if scheduler is not None and workflow.local_exec and hasattr(scheduler, "job_rate_limiter"):
        scheduler.job_rate_limiter = None


def step_command(step):
    """Shell command of a light step: ``python -m glmsteps.launch`` (a fork of a warm process).

    Light steps (events, confounds, design, contrasts, combining runs, thresholds) take well
    under a second, less than a fresh Python's imports; the launcher runs them in a process
    forked from one that imported everything once (see glmsteps/launch.py). Their inputs are a
    handful of files, so the command line stays short. Heavy steps (fit, group models,
    permutations, report) and the steps that read every map (index, report, whose input
    lists would exceed the kernel's 128 KB limit on one shell argument) keep their
    ``script:``: their own process, measured by Snakemake's benchmark and a cluster's memory
    accounting.
    """
    return command_template(step, python='"$GLMSTEPS_PYTHON"')


def heavy_step_command(step):
    """Shell command of a heavy step (the fit): its own fresh process, so that Snakemake's
    ``benchmark:`` and a cluster's accounting measure it, without Snakemake's script preamble."""
    return command_template(step, warm=False, python='"$GLMSTEPS_PYTHON"')


# ---------------------------------------------------------------- params (glmsteps/workflow_plan.py)
def events_params():
    return plan.events_params(config)


def confounds_params():
    return plan.confounds_params(config)


def design_params():
    return plan.design_params(config)


def fit_params():
    return plan.fit_params(config)


def contrast_params(wildcards):
    return plan.contrast_params(config, wildcards.contrast)


def run_threshold_params(wildcards):
    return plan.threshold_params(config, "run", wildcards.threshold)


def subject_threshold_params(wildcards):
    return plan.threshold_params(config, "subject", wildcards.threshold)


def group_threshold_params(wildcards):
    return plan.threshold_params(config, "group", wildcards.threshold)


def group_model_params(wildcards):
    return plan.group_model_params(config, wildcards.model, wildcards.group_contrast)


def group_permutation_params(wildcards):
    return plan.group_permutation_params(config, wildcards.model, wildcards.group_contrast)


def report_params():
    return plan.report_params(config)


# ---------------------------------------------------------------- resources
def fit_mem_mb(wildcards, attempt):
    """Memory (MB) for a fit job from the BOLD header's voxel and volume counts.

    In-mask float32 data is at most the whole 4D array (4 bytes a value); the fit keeps it
    once plus chunk work space, so 1.5x that plus 500 MB, doubled on each retry. Only this
    job's header is read, when the job is scheduled (a cluster job re-parses the Snakefile
    but evaluates resources of its own job only). An unreadable file falls back to its size;
    the fit job itself then reports the problem.
    """
    import nibabel as nib

    path = bold_file(wildcards)
    try:
        n_values = 1
        for n in nib.load(path).shape:
            n_values *= int(n)
        data_mb = 4 * n_values / 2**20
    except Exception:  # the fit job raises the user-facing error for a bad file
        data_mb = 4 * os.path.getsize(path) / 2**20 if os.path.exists(path) else 0
    return int(500 + 1.5 * data_mb) * 2 ** (attempt - 1)


# ---------------------------------------------------------------- targets
def group_contrasts_of(model):
    return PLAN.group_contrasts_of(model)


def indexed_maps():
    """Every statistical map that index.tsv lists."""
    return PLAN.indexed_maps()


# ---------------------------------------------------------------- the report
def _outputs_of(rule_name, key, combos):
    """A rule's named output for each wildcard combination (follows the rule if its file names change)."""
    pattern = getattr(getattr(rules, rule_name).output, key)
    return [pattern.format(**combo) for combo in combos]


def report_inputs(wildcards):
    """Everything the report shows (glmsteps/workflow_plan.py: WorkflowPlan.report_combos), as the named
    outputs of the rules that write it."""
    combos = PLAN.report_combos()
    runs, subject_thr, group_thr = combos["runs"], combos["subject_thresholds"], combos["group_thresholds"]
    participants = participants_file()
    return {
        "index": rules.index.output.index,
        "participants": [participants] if os.path.isfile(participants) else [],
        "fit": _outputs_of("fit", "fit", runs),
        "mean": _outputs_of("fit", "mean", runs),
        "ar_coef": _outputs_of("fit", "ar_coef", runs),
        "confounds_summary": _outputs_of("select_confounds", "summary", runs),
        "confounds_figure": _outputs_of("select_confounds", "figure", runs),
        "design_summary": _outputs_of("build_design", "summary", runs),
        "design_figure": _outputs_of("build_design", "figure", runs),
        "correlation_figure": _outputs_of("build_design", "correlation_figure", runs),
        "thresholded": _outputs_of("threshold_subject", "thresholded", subject_thr)
        + _outputs_of("threshold_group", "thresholded", group_thr),
        "clusters": _outputs_of("threshold_subject", "clusters", subject_thr)
        + _outputs_of("threshold_group", "clusters", group_thr),
        "site_qc": _outputs_of("group_model", "site_qc", combos["models"]),
        "site_figure": _outputs_of("group_model", "site_figure", combos["models"]),
        "permutation_clusters": _outputs_of("group_permutation", "clusters", combos["permuted"]),
    }


def report_subject_pages():
    """One page per subject."""
    return PLAN.report_subject_pages()


def all_targets():
    return PLAN.all_targets()


