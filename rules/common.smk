# Helpers that turn the validated config into targets, input paths and per-step params.
# Every params helper returns exactly the settings its step uses (and nothing broader), so
# that Snakemake's params trigger reruns precisely what a config edit affects. Rules pass
# them as ONE param, `settings` (a mapping with sorted keys): Snakemake records params as a
# set of value strings, so two booleans swapping values between separate params would go
# unnoticed, while the text of the whole mapping names every key.

import functools
import os
import re
import sys
import time

from snakemake.exceptions import WorkflowError
from snakemake.utils import validate

from glmsteps.bids import RunKey, check_pattern, discover_runs, parse_run_id
from glmsteps.errors import ConfigError, GlmstepsError
from glmsteps.launch import command_template, start_server
from glmsteps.precheck import check_config_contrasts, check_config_start
from glmsteps.renames import check_renamed
from glmsteps.report.summary import print_run_summary
from glmsteps.volumes import bids_sidecar_of

#: When this run started (the end-of-run summary counts the maps written since).
RUN_STARTED = time.time()


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

OUT = config["output_dir"].rstrip("/")
_INPUTS = config["inputs"]
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_]*$")


def _check_names(kind, names):
    for name in names:
        if not isinstance(name, str) or not _NAME.match(name):
            _config_error(f"{kind} name {name!r} must be letters, digits and underscores, starting with a letter or digit (quote a number in YAML)")


def discovered_runs():
    """Runs found by matching the bold pattern on disk (file names only, no image is opened)."""
    try:
        for key in ("bold", "events", "confounds", "mask") + (("tissue",) if _INPUTS["tissue"] else ()):
            check_pattern(key, _INPUTS[key])
        runs = discover_runs(_INPUTS["root"], _INPUTS["bold"])
    except ConfigError as exc:
        _config_error(str(exc))
    if _INPUTS["subjects"]:
        runs = [r for r in runs if r.subject in set(_INPUTS["subjects"])]
    if _INPUTS["tasks"]:
        runs = [r for r in runs if r.task in set(_INPUTS["tasks"])]
    if not runs:
        _config_error(f"no BOLD file under {_INPUTS['root']} matches inputs.bold = {_INPUTS['bold']!r}; "
                      "check inputs.root and the pattern")
    return runs


RUNS = discovered_runs()
SUBJECTS = sorted({r.subject for r in RUNS})
RUNS_OF_SUBJECT = {s: [r for r in RUNS if r.subject == s] for s in SUBJECTS}
CONTRASTS = config["contrasts"]
T_CONTRASTS = [name for name, spec in CONTRASTS.items() if "weights" in spec]
F_CONTRASTS = [name for name, spec in CONTRASTS.items() if "rows" in spec]
THRESHOLDS = config["thresholds"]
#: Write run-level contrast maps (and threshold them)? Subject maps never need them.
RUN_MAPS = config["contrast_options"]["run_maps"]
GROUP_MODELS = config["group_models"]
_check_names("contrast", CONTRASTS)
for _level in ("run", "subject", "group"):
    _check_names(f"thresholds.{_level}", THRESHOLDS[_level])
_check_names("group model", GROUP_MODELS)
for _model, _spec in GROUP_MODELS.items():
    _check_names(f"group_models.{_model}.group_contrasts", _spec["group_contrasts"])
    for _c in _spec["contrasts"]:
        if _c not in T_CONTRASTS:
            _config_error(f"group_models.{_model}.contrasts: {_c!r} is not a t contrast of the contrasts section "
                          f"(t contrasts: {', '.join(T_CONTRASTS) or 'none'})")


def events_files_of_runs():
    """The raw events TSV of every discovered run (paths only)."""
    return [os.path.join(_INPUTS["root"], r.fill(_INPUTS["events"])) for r in RUNS]


if workflow.is_main_process:
    # contrast keys against the conditions of the events files, before any job (reads only the condition
    # column of each events TSV; cluster jobs re-parsing this file skip it)
    try:
        check_config_start(config, config_files=workflow.configfiles)  # names, output_dir, repeated keys
        check_config_contrasts(config, events_files_of_runs())
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
RUN_DIR = OUT + "/sub-{subject}/{run_id}"
SUBJECT_DIR = OUT + "/sub-{subject}/combined"
GROUP_DIR = OUT + "/group/model-{model}/contrast-{contrast}/{group_contrast}"
LOG_DIR = OUT + "/logs"
#: Snakemake's benchmark files (wall time, memory, CPU) of the heavy steps.
BENCHMARK_DIR = OUT + "/benchmarks"
REPORT_DIR = OUT + "/report"


def _raw(kind, wildcards):
    key = parse_run_id(wildcards.subject, wildcards.run_id)
    return os.path.join(_INPUTS["root"], key.fill(_INPUTS[kind]))


def bold_file(wildcards):
    """Raw BOLD NIfTI of a run."""
    return _raw("bold", wildcards)


def events_file(wildcards):
    """Raw events TSV of a run."""
    return _raw("events", wildcards)


def confounds_file(wildcards):
    """Raw confounds TSV of a run."""
    return _raw("confounds", wildcards)


def bold_sidecar_file(wildcards):
    """The BOLD's BIDS JSON sidecar (RepetitionTime, SliceTiming) when the run has one, else nothing.

    An input of validate_events, so that editing it reruns the run's chain.
    """
    side = bids_sidecar_of(bold_file(wildcards))
    return [str(side)] if side.exists() else []


def mask_file(wildcards):
    """Mask NIfTI of a run."""
    return _raw("mask", wildcards)


def tissue_file(wildcards):
    """Tissue label map of a run (inputs.tissue), or no file when the config has none."""
    return [_raw("tissue", wildcards)] if _INPUTS["tissue"] else []


def participants_file():
    """The BIDS participants table."""
    return os.path.join(_INPUTS["root"], _INPUTS["participants"])


def runs_of(subject):
    """Run folder names (run_id) of one subject."""
    return [r.run_id for r in RUNS_OF_SUBJECT[subject]]


def subject_fits(wildcards):
    """A subject's run fits (fit.h5), in run order."""
    return [f"{OUT}/sub-{wildcards.subject}/{rid}/fit.h5" for rid in runs_of(wildcards.subject)]


def subject_underlay(wildcards):
    """Mean image of a subject's first run (figure underlay)."""
    return f"{OUT}/sub-{wildcards.subject}/{runs_of(wildcards.subject)[0]}/mean.nii.gz"


def group_underlay(wildcards):
    """Mean image of the first subject's first run (all subjects share one grid)."""
    return f"{OUT}/sub-{SUBJECTS[0]}/{runs_of(SUBJECTS[0])[0]}/mean.nii.gz"


def subject_maps_of(wildcards, stat):
    return [f"{OUT}/sub-{s}/combined/contrast-{wildcards.contrast}/{stat}.nii.gz" for s in SUBJECTS]


def subject_effects(wildcards):
    return subject_maps_of(wildcards, "effect")


def subject_variances(wildcards):
    return subject_maps_of(wildcards, "variance")


# ---------------------------------------------------------------- how jobs run
def start_launcher():
    """Warm the light steps' launcher as the run starts (see glmsteps/launch.py)."""
    start_server()


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
    return command_template(step)


def heavy_step_command(step):
    """Shell command of a heavy step (the fit): its own fresh process, so that Snakemake's
    ``benchmark:`` and a cluster's accounting measure it, without Snakemake's script preamble."""
    return command_template(step, warm=False)


# ---------------------------------------------------------------- params (one helper per step)
def canonical(value):
    """Params in a canonical form: mappings with sorted keys, all the way down.

    Snakemake compares a job's params with the recorded ones as text, so the key order of
    the config file must not matter: reordering keys must not trigger reruns.
    """
    if isinstance(value, dict):
        return {k: canonical(value[k]) for k in sorted(value)}
    if isinstance(value, (list, tuple)):
        return [canonical(v) for v in value]
    return value


def _canonical_params(helper):
    """Wrap a params helper so that its result is canonical (signature kept for Snakemake)."""

    @functools.wraps(helper)
    def wrapped(*args, **kwargs):
        return canonical(helper(*args, **kwargs))

    return wrapped


@_canonical_params
def events_params():
    """validate_events: the condition column, modulators, the two row policies and the TR rule's setting."""
    e = config["events"]
    return {"condition_column": e["condition_column"],
            "modulators": {k: list(v) for k, v in e["modulators"].items()},
            "duplicate_events": e["duplicate_events"], "missing_duration": e["missing_duration"],
            "repetition_time_s": config["acquisition"]["repetition_time_s"]}


@_canonical_params
def confounds_params():
    """select_confounds: the whole confounds section (selection, expansion, censoring)."""
    section = dict(config["confounds"])
    return section


@_canonical_params
def design_params():
    """build_design: HRF, drift, timing and condition settings (the TR is each run's own, from events.json)."""
    d = config["design"]
    return {"hrf": d["hrf"], "fir_bins": d["fir_bins"], "fir_bin_width_s": d["fir_bin_width_s"],
            "time_resolution_s": d["time_resolution_s"], "drift_basis": d["drift"]["basis"],
            "cutoff_s": d["drift"]["cutoff_s"], "legendre_order": d["drift"]["legendre_order"],
            "volume_time_fraction": config["acquisition"]["volume_time_fraction"],
            "conditions": list(config["events"]["conditions"]),
            "modulators": {k: list(v) for k, v in config["events"]["modulators"].items()}}


@_canonical_params
def fit_params():
    """fit: scaling, noise model and non-finite voxel policy (chunk size and threads do not change results;
    the tissue map is an input)."""
    f = config["fit"]
    return {"scaling": f["scaling"], "grand_mean_value": f["grand_mean_value"], "autocorrelation": f["autocorrelation"],
            "ar_order": f["ar_order"], "ar_smoothing_fwhm_mm": f["ar_smoothing_fwhm_mm"],
            "ar_bin_width": f["ar_bin_width"], "non_finite_voxels": f["non_finite_voxels"]}


def _contrast_params(name):
    spec = CONTRASTS[name]
    return {"name": name, "definition": dict(spec), "tail": spec.get("tail", "two-sided"),
            "skip_nonestimable": config["contrast_options"]["skip_nonestimable"]}


@_canonical_params
def contrast_params(wildcards):
    """contrast (t or F): this contrast's definition only."""
    return _contrast_params(wildcards.contrast)


_THRESHOLD_COMMON_KEYS = ("connectivity", "tail", "subpeaks", "subpeak_spacing_mm")
_THRESHOLD_KEYS = {
    "uncorrected": ("p", "min_cluster_voxels") + _THRESHOLD_COMMON_KEYS,
    "fdr": ("q",) + _THRESHOLD_COMMON_KEYS,
    "bonferroni": ("alpha",) + _THRESHOLD_COMMON_KEYS,
    "cluster_extent": ("forming_p", "min_cluster_voxels") + _THRESHOLD_COMMON_KEYS,
}


def _threshold_params(level, name):
    """threshold: only the keys its method uses (schema defaults fill the others)."""
    setting = THRESHOLDS[level][name]
    keys = _THRESHOLD_KEYS[setting["method"]]
    return {"name": name, "method": setting["method"], **{k: setting[k] for k in keys}}


@_canonical_params
def run_threshold_params(wildcards):
    return _threshold_params("run", wildcards.threshold)


@_canonical_params
def subject_threshold_params(wildcards):
    return _threshold_params("subject", wildcards.threshold)


@_canonical_params
def group_threshold_params(wildcards):
    return _threshold_params("group", wildcards.threshold)


_GROUP_DESIGN_KEYS = {
    "one_sample": (), "regression": (), "two_sample": ("group_column",), "paired": ("group_column", "pair_column"),
}
_GROUP_MODEL_KEYS = ("design", "covariates", "site_column", "site_as_covariate", "estimation", "harmonise_sites",
                     "mask_fraction", "tail")


@_canonical_params
def group_model_params(wildcards):
    """group_model: the model's settings for its design and this job's group contrast only."""
    spec = GROUP_MODELS[wildcards.model]
    keys = _GROUP_MODEL_KEYS + _GROUP_DESIGN_KEYS[spec["design"]]
    return {**{k: spec[k] for k in keys},
            "contrast": {"name": wildcards.group_contrast,
                         "weights": dict(spec["group_contrasts"][wildcards.group_contrast])}}


@_canonical_params
def group_permutation_params(wildcards):
    """group_permutation: the model, the group contrast and the permutation settings."""
    return {**group_model_params(wildcards), "permutation": dict(GROUP_MODELS[wildcards.model]["permutation"])}


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
    return list(GROUP_MODELS[model]["group_contrasts"])


def group_inputs_of(model):
    return GROUP_MODELS[model]["contrasts"] or T_CONTRASTS


def run_targets():
    targets = []
    for r in RUNS:
        base = f"{OUT}/sub-{r.subject}/{r.run_id}"
        targets += [f"{base}/design_correlation.png", f"{base}/confounds.png", f"{base}/fit.h5"]
        for name in CONTRASTS if RUN_MAPS else []:
            targets.append(f"{base}/contrast-{name}/z.nii.gz")
            targets += [f"{base}/contrast-{name}/threshold-{t}/clusters.tsv" for t in THRESHOLDS["run"]]
    return targets


def subject_targets():
    targets = []
    for s in SUBJECTS:
        for name in CONTRASTS:
            base = f"{OUT}/sub-{s}/combined/contrast-{name}"
            targets.append(f"{base}/z.nii.gz")
            targets += [f"{base}/threshold-{t}/clusters.tsv" for t in THRESHOLDS["subject"]]
    return targets


def group_targets():
    targets = []
    for model, spec in GROUP_MODELS.items():
        for name in group_inputs_of(model):
            for gcon in group_contrasts_of(model):
                base = f"{OUT}/group/model-{model}/contrast-{name}/{gcon}"
                targets.append(f"{base}/z.nii.gz")
                if spec["permutation"]:
                    targets.append(f"{base}/p_fwe.nii.gz")
                    if spec["permutation"]["tfce"]:
                        targets.append(f"{base}/p_fwe_tfce.nii.gz")
                targets += [f"{base}/threshold-{t}/clusters.tsv" for t in THRESHOLDS["group"]]
    return targets


def indexed_maps():
    """Every statistical map that index.tsv lists."""
    maps = []
    for r in RUNS if RUN_MAPS else []:
        base = f"{OUT}/sub-{r.subject}/{r.run_id}"
        for name in T_CONTRASTS:
            maps += [f"{base}/contrast-{name}/{s}.nii.gz" for s in ("effect", "variance", "t", "z", "p")]
        for name in F_CONTRASTS:
            maps += [f"{base}/contrast-{name}/{s}.nii.gz" for s in ("f", "z", "p")]
    for s in SUBJECTS:
        for name in T_CONTRASTS:
            maps += [f"{OUT}/sub-{s}/combined/contrast-{name}/{x}.nii.gz" for x in ("effect", "variance", "t", "z", "p")]
        for name in F_CONTRASTS:
            maps += [f"{OUT}/sub-{s}/combined/contrast-{name}/{x}.nii.gz" for x in ("f", "z", "p")]
    for model, spec in GROUP_MODELS.items():
        for name in group_inputs_of(model):
            for gcon in group_contrasts_of(model):
                base = f"{OUT}/group/model-{model}/contrast-{name}/{gcon}"
                maps += [f"{base}/{x}.nii.gz" for x in ("effect", "variance", "t", "z", "p")]
                if spec["permutation"]:
                    maps += [f"{base}/{x}.nii.gz" for x in ("p_fwe", "p_fwe_cluster")]
                    if spec["permutation"]["tfce"]:
                        maps.append(f"{base}/p_fwe_tfce.nii.gz")
    return maps


# ---------------------------------------------------------------- the report
def _outputs_of(rule_name, key, combos):
    """A rule's named output for each wildcard combination (follows the rule if its file names change)."""
    pattern = getattr(getattr(rules, rule_name).output, key)
    return [pattern.format(**combo) for combo in combos]


def report_inputs(wildcards):
    """Everything the report shows: the index, the participants table, per-run summaries, fits and figures,
    subject and group thresholds, group site QC and permutation clusters (run-level thresholds are not
    shown, so that changing them reruns only their own jobs)."""
    runs = [{"subject": r.subject, "run_id": r.run_id} for r in RUNS]
    subject_thr = [{"subject": s, "contrast": c, "threshold": t}
                   for s in SUBJECTS for c in T_CONTRASTS for t in THRESHOLDS["subject"]]
    models = [{"model": m, "contrast": c, "group_contrast": g}
              for m in GROUP_MODELS for c in group_inputs_of(m) for g in group_contrasts_of(m)]
    group_thr = [dict(combo, threshold=t) for combo in models for t in THRESHOLDS["group"]]
    permuted = [combo for combo in models if GROUP_MODELS[combo["model"]]["permutation"]]
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
        "site_qc": _outputs_of("group_model", "site_qc", models),
        "site_figure": _outputs_of("group_model", "site_figure", models),
        "permutation_clusters": _outputs_of("group_permutation", "clusters", permuted),
    }


def report_subject_pages():
    """One page per subject."""
    return [f"{REPORT_DIR}/sub-{s}.html" for s in SUBJECTS]


@_canonical_params
def report_params():
    """report: the config's report section (sites for the outlier rule, mosaic layout)."""
    return dict(config["report"])


def all_targets():
    return run_targets() + subject_targets() + group_targets() + [f"{OUT}/index.tsv", f"{REPORT_DIR}/index.html"]
