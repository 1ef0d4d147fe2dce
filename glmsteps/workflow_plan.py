"""The workflow's plan over a validated config: per-step params, input paths and targets.

``rules/common.smk`` is wiring only: it validates the config, discovers the runs and hands
both to :class:`WorkflowPlan`; the rules call its methods. Plain Python over the config dict
(schema defaults filled in) and the runs, so every path and every params mapping is
unit-tested in milliseconds without a Snakemake dry run (tests/test_workflow_plan.py).

Every params helper returns exactly the settings its step uses (and nothing broader), so
that Snakemake's params trigger reruns precisely what a config edit affects. Rules pass
them as ONE param, ``settings`` (a mapping with sorted keys, :func:`canonical`): Snakemake
records params as a set of value strings, so two booleans swapping values between separate
params would go unnoticed, while the text of the whole mapping names every key.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from .bids import RunKey, parse_run_id
from .errors import ConfigError
from .names import is_folder_name

#: Statistical maps of a t contrast and of an F contrast (run, subject and group level).
T_MAPS: tuple[str, ...] = ("effect", "variance", "t", "z", "p")
F_MAPS: tuple[str, ...] = ("f", "z", "p")

_THRESHOLD_COMMON_KEYS = ("connectivity", "tail", "subpeaks", "subpeak_spacing_mm")
#: The keys of a threshold setting each method uses (the schema's defaults fill the others).
THRESHOLD_KEYS: dict[str, tuple[str, ...]] = {
    "uncorrected": ("p", "min_cluster_voxels") + _THRESHOLD_COMMON_KEYS,
    "fdr": ("q",) + _THRESHOLD_COMMON_KEYS,
    "bonferroni": ("alpha",) + _THRESHOLD_COMMON_KEYS,
    "cluster_extent": ("forming_p", "min_cluster_voxels") + _THRESHOLD_COMMON_KEYS,
}
_GROUP_DESIGN_KEYS: dict[str, tuple[str, ...]] = {
    "one_sample": (), "regression": (), "two_sample": ("group_column",), "paired": ("group_column", "pair_column"),
}
_GROUP_MODEL_KEYS = ("design", "covariates", "site_column", "site_as_covariate", "estimation", "harmonise_sites",
                     "mask_fraction", "tail")


def canonical(value: Any) -> Any:
    """Params in a canonical form: mappings with sorted keys, all the way down (lists for tuples).

    Snakemake compares a job's params with the recorded ones as text, so the key order of
    the config file must not matter: reordering keys must not trigger reruns.

    Examples
    --------
    >>> canonical({"b": 1, "a": {"d": (2, 3), "c": 4}})
    {'a': {'c': 4, 'd': [2, 3]}, 'b': 1}
    """
    if isinstance(value, dict):
        return {k: canonical(value[k]) for k in sorted(value)}
    if isinstance(value, (list, tuple)):
        return [canonical(v) for v in value]
    return value


def check_names(config: Mapping[str, Any]) -> None:
    """Contrast, threshold, group model and group contrast names, and the group models' contrasts.

    Raises
    ------
    ConfigError
        A name that is not letters, digits and underscores starting with a letter or digit,
        or a group model listing a contrast that is not a t contrast of the config.
    """
    def names_ok(kind: str, names: Sequence[str]) -> None:
        for name in names:
            if not is_folder_name(name):
                raise ConfigError(f"{kind} name {name!r} must be letters, digits and underscores, "
                                  "starting with a letter or digit (quote a number in YAML)")

    contrasts = config["contrasts"]
    t_contrasts = [name for name, spec in contrasts.items() if "weights" in spec]
    names_ok("contrast", list(contrasts))
    for level in ("run", "subject", "group"):
        names_ok(f"thresholds.{level}", list(config["thresholds"][level]))
    models = config["group_models"]
    names_ok("group model", list(models))
    for model, spec in models.items():
        names_ok(f"group_models.{model}.group_contrasts", list(spec["group_contrasts"]))
        for name in spec["contrasts"]:
            if name not in t_contrasts:
                raise ConfigError(f"group_models.{model}.contrasts: {name!r} is not a t contrast of the contrasts "
                                  f"section (t contrasts: {', '.join(t_contrasts) or 'none'})")


# ---------------------------------------------------------------- params (one function per step)
def events_params(config: Mapping[str, Any]) -> dict[str, Any]:
    """validate_events: the condition column, modulators, the two row policies and the TR rule's setting."""
    e = config["events"]
    return canonical({"condition_column": e["condition_column"],
                      "modulators": {k: list(v) for k, v in e["modulators"].items()},
                      "duplicate_events": e["duplicate_events"], "missing_duration": e["missing_duration"],
                      "repetition_time_s": config["acquisition"]["repetition_time_s"]})


def confounds_params(config: Mapping[str, Any]) -> dict[str, Any]:
    """select_confounds: the whole confounds section (selection, expansion, censoring)."""
    return canonical(dict(config["confounds"]))


def design_params(config: Mapping[str, Any]) -> dict[str, Any]:
    """build_design: HRF, drift, timing and condition settings (the TR is each run's own, from events.json)."""
    d = config["design"]
    return canonical({"hrf": d["hrf"], "fir_bins": d["fir_bins"], "fir_bin_width_s": d["fir_bin_width_s"],
                      "time_resolution_s": d["time_resolution_s"], "drift_basis": d["drift"]["basis"],
                      "cutoff_s": d["drift"]["cutoff_s"], "legendre_order": d["drift"]["legendre_order"],
                      "volume_time_fraction": config["acquisition"]["volume_time_fraction"],
                      "conditions": list(config["events"]["conditions"]),
                      "modulators": {k: list(v) for k, v in config["events"]["modulators"].items()}})


def fit_params(config: Mapping[str, Any]) -> dict[str, Any]:
    """fit: scaling, autocorrelation model and non-finite voxel policy (chunk size and threads do not change results;
    the tissue map is an input)."""
    f = config["fit"]
    return canonical({"scaling": f["scaling"], "grand_mean_value": f["grand_mean_value"],
                      "autocorrelation": f["autocorrelation"], "ar_order": f["ar_order"],
                      "ar_smoothing_fwhm_mm": f["ar_smoothing_fwhm_mm"], "ar_bin_width": f["ar_bin_width"],
                      "non_finite_voxels": f["non_finite_voxels"]})


def contrast_params(config: Mapping[str, Any], name: str) -> dict[str, Any]:
    """contrast and combine_runs (t or F): this contrast's definition only."""
    spec = config["contrasts"][name]
    return canonical({"name": name, "definition": dict(spec), "tail": spec.get("tail", "two-sided"),
                      "skip_nonestimable": config["contrast_options"]["skip_nonestimable"]})


def threshold_params(config: Mapping[str, Any], level: str, name: str) -> dict[str, Any]:
    """threshold (``level`` run, subject or group): only the keys its method uses."""
    setting = config["thresholds"][level][name]
    keys = THRESHOLD_KEYS[setting["method"]]
    return canonical({"name": name, "method": setting["method"], **{k: setting[k] for k in keys}})


def group_model_params(config: Mapping[str, Any], model: str, group_contrast: str) -> dict[str, Any]:
    """group_model: the model's settings for its design and this job's group contrast only."""
    spec = config["group_models"][model]
    keys = _GROUP_MODEL_KEYS + _GROUP_DESIGN_KEYS[spec["design"]]
    return canonical({**{k: spec[k] for k in keys},
                      "contrast": {"name": group_contrast, "weights": dict(spec["group_contrasts"][group_contrast])}})


def group_permutation_params(config: Mapping[str, Any], model: str, group_contrast: str) -> dict[str, Any]:
    """group_permutation: the model, the group contrast and the permutation settings."""
    return canonical({**group_model_params(config, model, group_contrast),
                      "permutation": dict(config["group_models"][model]["permutation"])})


def report_params(config: Mapping[str, Any]) -> dict[str, Any]:
    """report: the config's report section (sites for the outlier rule, mosaic layout)."""
    return canonical(dict(config["report"]))


# ---------------------------------------------------------------- paths and targets
@dataclass(frozen=True)
class WorkflowPlan:
    """Paths and targets of one study: a validated config and its discovered runs.

    Attributes
    ----------
    config : mapping
        The validated config (schema defaults filled in).
    runs : tuple of RunKey
        The discovered runs, in discovery order.
    """

    config: Mapping[str, Any]
    runs: tuple[RunKey, ...]
    _runs_of_subject: dict[str, tuple[RunKey, ...]] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        by_subject: dict[str, list[RunKey]] = {}
        for run in self.runs:
            by_subject.setdefault(run.subject, []).append(run)
        object.__setattr__(self, "_runs_of_subject", {s: tuple(by_subject[s]) for s in sorted(by_subject)})

    # -- the config's sections
    @property
    def out(self) -> str:
        """The results folder (no trailing slash)."""
        return str(self.config["output_dir"]).rstrip("/")

    @property
    def subjects(self) -> list[str]:
        """Subjects with at least one run, sorted."""
        return list(self._runs_of_subject)

    @property
    def contrasts(self) -> list[str]:
        return list(self.config["contrasts"])

    @property
    def t_contrasts(self) -> list[str]:
        return [name for name, spec in self.config["contrasts"].items() if "weights" in spec]

    @property
    def f_contrasts(self) -> list[str]:
        return [name for name, spec in self.config["contrasts"].items() if "rows" in spec]

    @property
    def run_maps(self) -> bool:
        """Write run-level contrast maps (and threshold them)? Subject maps never need them."""
        return bool(self.config["contrast_options"]["run_maps"])

    def thresholds(self, level: str) -> list[str]:
        """Threshold settings of a level (run, subject, group)."""
        return list(self.config["thresholds"][level])

    @property
    def models(self) -> list[str]:
        return list(self.config["group_models"])

    def group_contrasts_of(self, model: str) -> list[str]:
        return list(self.config["group_models"][model]["group_contrasts"])

    def group_inputs_of(self, model: str) -> list[str]:
        """First-level contrasts a group model takes (default: every t contrast)."""
        return list(self.config["group_models"][model]["contrasts"]) or self.t_contrasts

    def permuted(self, model: str) -> bool:
        return bool(self.config["group_models"][model]["permutation"])

    # -- raw inputs
    def raw_file(self, kind: str, subject: str, run_id: str) -> str:
        """A run's raw input (``kind`` a key of ``inputs``: bold, events, confounds, mask, tissue)."""
        inputs = self.config["inputs"]
        return os.path.join(inputs["root"], parse_run_id(subject, run_id).fill(inputs[kind]))

    def events_files(self) -> list[str]:
        """The raw events TSV of every run (paths only)."""
        inputs = self.config["inputs"]
        return [os.path.join(inputs["root"], r.fill(inputs["events"])) for r in self.runs]

    def participants_file(self) -> str:
        """The BIDS participants table."""
        return os.path.join(self.config["inputs"]["root"], self.config["inputs"]["participants"])

    # -- per-subject inputs
    def runs_of(self, subject: str) -> list[str]:
        """Run folder names (run_id) of one subject."""
        return [r.run_id for r in self._runs_of_subject[subject]]

    def subject_fits(self, subject: str) -> list[str]:
        """A subject's run fits (fit.h5), in run order."""
        return [f"{self.out}/sub-{subject}/{rid}/fit.h5" for rid in self.runs_of(subject)]

    def subject_underlay(self, subject: str) -> str:
        """Mean image of a subject's first run (figure underlay)."""
        return f"{self.out}/sub-{subject}/{self.runs_of(subject)[0]}/mean.nii.gz"

    def group_underlay(self) -> str:
        """Mean image of the first subject's first run (all subjects share one grid)."""
        return self.subject_underlay(self.subjects[0])

    def subject_maps(self, contrast: str, stat: str) -> list[str]:
        """One combined map (``stat``) of a contrast for every subject."""
        return [f"{self.out}/sub-{s}/combined/contrast-{contrast}/{stat}.nii.gz" for s in self.subjects]

    # -- targets
    def run_targets(self) -> list[str]:
        targets = []
        for r in self.runs:
            base = f"{self.out}/sub-{r.subject}/{r.run_id}"
            targets += [f"{base}/design_correlation.png", f"{base}/confounds.png", f"{base}/fit.h5"]
            for name in self.contrasts if self.run_maps else []:
                targets.append(f"{base}/contrast-{name}/z.nii.gz")
                targets += [f"{base}/contrast-{name}/threshold-{t}/clusters.tsv" for t in self.thresholds("run")]
        return targets

    def subject_targets(self) -> list[str]:
        targets = []
        for s in self.subjects:
            for name in self.contrasts:
                base = f"{self.out}/sub-{s}/combined/contrast-{name}"
                targets.append(f"{base}/z.nii.gz")
                targets += [f"{base}/threshold-{t}/clusters.tsv" for t in self.thresholds("subject")]
        return targets

    def group_targets(self) -> list[str]:
        targets = []
        for model in self.models:
            tfce = self.permuted(model) and self.config["group_models"][model]["permutation"]["tfce"]
            for name in self.group_inputs_of(model):
                for gcon in self.group_contrasts_of(model):
                    base = f"{self.out}/group/model-{model}/contrast-{name}/{gcon}"
                    targets.append(f"{base}/z.nii.gz")
                    if self.permuted(model):
                        targets.append(f"{base}/p_fwe.nii.gz")
                        if tfce:
                            targets.append(f"{base}/p_fwe_tfce.nii.gz")
                    targets += [f"{base}/threshold-{t}/clusters.tsv" for t in self.thresholds("group")]
        return targets

    def indexed_maps(self) -> list[str]:
        """Every statistical map that index.tsv lists."""
        maps = []
        for r in self.runs if self.run_maps else []:
            base = f"{self.out}/sub-{r.subject}/{r.run_id}"
            maps += self._contrast_maps(base)
        for s in self.subjects:
            maps += self._contrast_maps(f"{self.out}/sub-{s}/combined")
        for model in self.models:
            for name in self.group_inputs_of(model):
                for gcon in self.group_contrasts_of(model):
                    base = f"{self.out}/group/model-{model}/contrast-{name}/{gcon}"
                    maps += [f"{base}/{x}.nii.gz" for x in T_MAPS]
                    if self.permuted(model):
                        maps += [f"{base}/{x}.nii.gz" for x in ("p_fwe", "p_fwe_cluster")]
                        if self.config["group_models"][model]["permutation"]["tfce"]:
                            maps.append(f"{base}/p_fwe_tfce.nii.gz")
        return maps

    def _contrast_maps(self, base: str) -> list[str]:
        maps = []
        for name in self.t_contrasts:
            maps += [f"{base}/contrast-{name}/{s}.nii.gz" for s in T_MAPS]
        for name in self.f_contrasts:
            maps += [f"{base}/contrast-{name}/{s}.nii.gz" for s in F_MAPS]
        return maps

    def report_dir(self) -> str:
        return f"{self.out}/report"

    def report_subject_pages(self) -> list[str]:
        """One page per subject."""
        return [f"{self.report_dir()}/sub-{s}.html" for s in self.subjects]

    def all_targets(self) -> list[str]:
        return (self.run_targets() + self.subject_targets() + self.group_targets()
                + [f"{self.out}/index.tsv", f"{self.report_dir()}/index.html"])

    # -- the report's inputs, as wildcard combinations of the rules it reads
    def report_combos(self) -> dict[str, list[dict[str, str]]]:
        """Wildcards of the jobs whose outputs the report shows: every run; subject thresholds of t contrasts;
        every group model job, its thresholds and its permutations (run-level thresholds are not shown, so
        that changing them reruns only their own jobs)."""
        models = [{"model": m, "contrast": c, "group_contrast": g}
                  for m in self.models for c in self.group_inputs_of(m) for g in self.group_contrasts_of(m)]
        return {
            "runs": [{"subject": r.subject, "run_id": r.run_id} for r in self.runs],
            "subject_thresholds": [{"subject": s, "contrast": c, "threshold": t}
                                   for s in self.subjects for c in self.t_contrasts for t in self.thresholds("subject")],
            "models": models,
            "group_thresholds": [dict(combo, threshold=t) for combo in models for t in self.thresholds("group")],
            "permuted": [combo for combo in models if self.permuted(combo["model"])],
        }
