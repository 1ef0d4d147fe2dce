"""Group step: one group contrast of one first-level contrast over subjects.

Inputs
    ``effect`` (list of NIfTI), ``variance`` (list of NIfTI): each subject's
    combined first-level effect and variance map; the JSON sidecar of each
    (``<stem>.json``) gives the subject in its ``map`` block.
    ``participants``: BIDS participants.tsv (``participant_id`` = ``sub-XX``).
Params
    ``design``, ``group_column``, ``pair_column``, ``covariates``,
    ``site_column``, ``site_as_covariate``, ``estimation``, ``harmonise_sites``,
    ``mask_fraction``, ``contrast`` (``{"name": str, "weights": {column: weight}}``).
Wildcards
    ``model``, ``contrast`` (first level), ``group_contrast``.
Outputs
    ``effect``, ``variance``, ``t``, ``z``, ``p`` (NIfTI), ``site_qc`` (JSON),
    ``site_figure`` (PNG).

The reading and validation of inputs (:func:`load_group_data`) is shared with
``glmsteps.jobs.group_permutation``. Everything is validated before anything
is written.

Group mask: voxels where at least ``mask_fraction`` of the kept subjects have
a finite effect (and, for the mixed models, a finite positive variance). Each
voxel is fitted on the subjects present there (see
:func:`glmsteps.group.fit_contrast_with_missing`). With ``harmonise_sites`` the
mask is restricted to voxels present in every kept subject, since the
harmonisation needs complete data.

The parametric p map is one-sided (P(T >= t), large positive effects), z is
the standard normal value with the same upper-tail probability, both computed
in log space so that far tails do not underflow to 0 / inf.
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import special, stats

from .. import group as gm
from ..errors import GlmstepsWarning, GroupError
from ..fileio import read_json, read_tsv, write_json
from ..harmonise import harmonise_site_effects
from ..maps import load_map, save_map
from ..plots.sites import plot_site_effects
from ..provenance import build_record, collect_warnings, sidecar_path, write_sidecar

LOGGER = logging.getLogger("glmsteps")
STEP = "group"
#: Voxels per chunk of the mixed-effects fit (bounds the (v, n, p) work arrays).
CHUNK_VOXELS = 4096
MODEL_KEYS: tuple[str, ...] = ("design", "group_column", "pair_column", "covariates", "site_column",
                               "site_as_covariate", "estimation", "harmonise_sites", "mask_fraction")
MODEL_DEFAULTS: dict[str, Any] = {"group_column": None, "pair_column": None, "covariates": [],
                                  "site_column": "site", "site_as_covariate": True, "estimation": "ols",
                                  "harmonise_sites": False, "mask_fraction": 1.0}


@dataclass
class GroupData:
    """Validated group inputs, ready for the maths.

    Attributes
    ----------
    subjects : list of str
        Kept subjects (without ``sub-``), row order of every array.
    table : DataFrame
        Their participants rows.
    Y, V : ndarray, shape (n_subjects, n_voxels)
        Effects and first-level variances at the group-mask voxels.
    voxel_index : ndarray of int, shape (n_voxels,)
        Flat C-order indices of the group-mask voxels.
    shape, affine
        Grid.
    design : glmsteps.group.GroupDesign
    c : ndarray, shape (n_regressors,)
    sites : list of str
        Site of each kept subject (``"all"`` without a site column).
    settings : dict
        The model settings with defaults filled in.
    excluded : list of dict
        ``{"subject", "reason"}`` of every subject left out.
    task : str or None
        Task of the first-level maps when they agree.
    harmonised : bool
    site_qc : dict
        Per-site summaries (``as_entered`` and ``harmonised``) and per-subject means.
    """

    subjects: list[str]
    table: pd.DataFrame
    Y: npt.NDArray[np.float64]
    V: npt.NDArray[np.float64]
    voxel_index: npt.NDArray[np.int64]
    shape: tuple[int, int, int]
    affine: npt.NDArray[np.float64]
    design: gm.GroupDesign
    c: npt.NDArray[np.float64]
    contrast_name: str
    sites: list[str]
    settings: dict[str, Any]
    excluded: list[dict[str, str]] = field(default_factory=list)
    task: str | None = None
    harmonised: bool = False
    site_qc: dict[str, Any] = field(default_factory=dict)
    voxels_in_mask: int = 0


# ---------------------------------------------------------------------------
# validation and reading (shared with group_permutation)
# ---------------------------------------------------------------------------

def model_settings(params: Mapping[str, Any]) -> dict[str, Any]:
    """The group model settings with defaults, validated (GroupError on a bad value)."""
    settings = dict(MODEL_DEFAULTS)
    settings.update({k: params[k] for k in MODEL_KEYS if k in params})
    if "design" not in params:
        raise GroupError(f"group params: 'design' is missing; set it to one of {list(gm.DESIGNS)}")
    if settings["design"] not in gm.DESIGNS:
        raise GroupError(f"group params: design {settings['design']!r} is unknown; use one of {list(gm.DESIGNS)}")
    if settings["estimation"] not in gm.ESTIMATIONS:
        raise GroupError(f"group params: estimation {settings['estimation']!r} is unknown; "
                         f"use one of {list(gm.ESTIMATIONS)}")
    fraction = settings["mask_fraction"]
    if isinstance(fraction, bool) or not isinstance(fraction, (int, float)) or not 0 < float(fraction) <= 1:
        raise GroupError(f"group params: mask_fraction is {fraction!r}; use a number in (0, 1]")
    covariates = settings["covariates"] or []
    if isinstance(covariates, str) or not all(isinstance(c, str) for c in covariates):
        raise GroupError(f"group params: covariates is {covariates!r}; give a list of participants column names")
    settings["covariates"] = list(covariates)
    for key in ("site_as_covariate", "harmonise_sites"):
        if not isinstance(settings[key], bool):
            raise GroupError(f"group params: {key} is {settings[key]!r}; use true or false")
    if settings["design"] in ("two_sample", "paired") and not settings["group_column"]:
        raise GroupError(f"group params: design {settings['design']} needs group_column; set it")
    if settings["design"] == "paired" and not settings["pair_column"]:
        raise GroupError("group params: design paired needs pair_column (the label shared by a pair); set it")
    return settings


def contrast_spec(params: Mapping[str, Any], wildcards: Mapping[str, str]) -> tuple[str, dict[str, float]]:
    """The job's group contrast ``(name, weights)`` from params (checked against the wildcard)."""
    spec = params.get("contrast")
    if not isinstance(spec, Mapping) or "name" not in spec or not isinstance(spec.get("weights"), Mapping):
        raise GroupError(f"group params: contrast is {spec!r}; give {{name: ..., weights: {{column: weight}}}}")
    name = str(spec["name"])
    wanted = wildcards.get("group_contrast")
    if wanted is not None and str(wanted) != name:
        raise GroupError(f"group params: contrast name {name!r} differs from the group_contrast wildcard "
                         f"{wanted!r}; the rule must pass the contrast it names")
    return name, {str(k): v for k, v in spec["weights"].items()}


def subject_of_map(path: str) -> tuple[str, dict[str, Any]]:
    """Subject label (without ``sub-``) and map block from a map's JSON sidecar."""
    side = sidecar_path(path)
    try:
        block = read_json(side).get("map")
    except FileNotFoundError as exc:
        raise GroupError(f"{side}: sidecar of {path} is missing; the group step reads the subject from its "
                         "'map' block (rerun the subject-level step)") from exc
    if not isinstance(block, Mapping) or not block.get("subject"):
        raise GroupError(f"{side}: no 'map' block with a subject; rerun the step that wrote {path}")
    return normalise_subject(str(block["subject"])), dict(block)


def normalise_subject(label: str) -> str:
    """``sub-01`` and ``01`` both become ``01``."""
    return label[4:] if label.startswith("sub-") else label


def _maps_by_subject(paths: Sequence[str], kind: str) -> tuple[dict[str, str], list[dict[str, Any]]]:
    found: dict[str, str] = {}
    blocks = []
    for path in paths:
        subject, block = subject_of_map(path)
        if subject in found:
            raise GroupError(f"{path}: subject {subject} already has the {kind} map {found[subject]}; "
                             "give one map per subject")
        found[subject] = path
        blocks.append(block)
    return found, blocks


def read_participants(path: str, columns: Sequence[str]) -> pd.DataFrame:
    """participants.tsv indexed by subject label (without ``sub-``), checking the needed columns."""
    try:
        table = read_tsv(path)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise GroupError(f"{path}: cannot read participants table ({exc}); give a tab-separated file") from exc
    if "participant_id" not in table.columns:
        raise GroupError(f"{path}: no participant_id column (found {list(table.columns)}); add the BIDS column")
    ids = table["participant_id"].astype(str).map(normalise_subject)
    duplicated = sorted(set(ids[ids.duplicated()].tolist()))
    if duplicated:
        raise GroupError(f"{path}: participant_id {duplicated} appear more than once; keep one row per subject")
    missing = [c for c in columns if c not in table.columns]
    if missing:
        raise GroupError(f"{path}: column(s) {missing} named in the group model are absent (found "
                         f"{list(table.columns)}); fix the model or the table")
    table = table.copy()
    table.index = ids
    return table


def _check_grids(grids: dict[str, tuple[tuple[int, ...], np.ndarray]]) -> tuple[tuple[int, int, int], np.ndarray]:
    reference_subject = next(iter(grids))
    shape0, affine0 = grids[reference_subject]
    groups: dict[str, list[str]] = {}
    for subject, (shape, affine) in grids.items():
        key = f"shape {tuple(shape)} affine {np.round(affine[:3], 3).tolist()}"
        groups.setdefault(key, []).append(subject)
    if len(groups) > 1:
        parts = "; ".join(f"subjects {subs[:5]}{'...' if len(subs) > 5 else ''}: {key}" for key, subs in groups.items())
        raise GroupError(f"group maps are on different grids ({parts}); resample every subject's map to one grid")
    return tuple(int(s) for s in shape0), affine0  # type: ignore[return-value]


def load_group_data(inputs: Mapping[str, Any], params: Mapping[str, Any],
                    wildcards: Mapping[str, str]) -> GroupData:
    """Read and validate every group input; build the design, contrast and group mask.

    Subjects lacking a map, a variance map, a participants row or a value in a
    column the model uses are warned about (GlmstepsWarning) and excluded.
    Site harmonisation, when requested, is applied here so both group jobs
    analyse the same data.
    """
    settings = model_settings(params)
    contrast_name, weights = contrast_spec(params, wildcards)
    effects = list(inputs["effect"]) if not isinstance(inputs["effect"], str) else [inputs["effect"]]
    variances = list(inputs["variance"]) if not isinstance(inputs["variance"], str) else [inputs["variance"]]
    if not effects:
        raise GroupError("group inputs: no effect maps; the group step needs one per subject")
    site_column = settings["site_column"]
    used = [c for c in (settings["group_column"], settings["pair_column"], *settings["covariates"]) if c]
    table = read_participants(inputs["participants"], used)
    if site_column and site_column not in table.columns:
        if settings["harmonise_sites"]:
            raise GroupError(f"{inputs['participants']}: site column {site_column!r} is absent; add it or set "
                             "harmonise_sites: false")
        warnings.warn(f"{inputs['participants']}: no site column {site_column!r}; site is not modelled "
                      "(set site_column: null to silence this)", GlmstepsWarning, stacklevel=2)
        site_column = None
    if site_column:
        used.append(site_column)
    effect_by, blocks = _maps_by_subject(effects, "effect")
    variance_by, _ = _maps_by_subject(variances, "variance")
    tasks = {b.get("task") for b in blocks}

    excluded: list[dict[str, str]] = []

    def exclude(subject: str, reason: str) -> None:
        excluded.append({"subject": subject, "reason": reason})
        warnings.warn(f"group: subject sub-{subject} excluded: {reason}", GlmstepsWarning, stacklevel=3)

    kept: list[str] = []
    for subject in sorted(set(effect_by) | set(variance_by) | set(table.index)):
        if subject not in table.index:
            exclude(subject, f"no row in {inputs['participants']}")
        elif subject not in effect_by:
            exclude(subject, "no effect map")
        elif subject not in variance_by:
            exclude(subject, "no variance map")
        else:
            empty = [c for c in dict.fromkeys(used) if pd.isna(table.at[subject, c])]
            if empty:
                exclude(subject, f"missing value (n/a) in column(s) {empty}")
            else:
                kept.append(subject)
    if not kept:
        raise GroupError(f"group: no subject has maps and complete participants rows ({len(excluded)} excluded); "
                         "check participant_id against the maps' subjects")
    rows = table.loc[kept]
    design = gm.build_group_design(rows, settings["design"], settings["group_column"], settings["pair_column"],
                                   settings["covariates"], site_column, settings["site_as_covariate"],
                                   source=str(inputs["participants"]))
    c = gm.contrast_vector(weights, design.names, contrast_name)
    if not gm.is_estimable(design.matrix, c):
        raise GroupError(f"group contrast {contrast_name!r} is not estimable in the design {design.names}; "
                         "change its weights")

    # maps: read effects and variances, check one grid, build the mask
    grids: dict[str, tuple[tuple[int, ...], np.ndarray]] = {}
    effect_maps, variance_maps = [], []
    for subject in kept:
        e, affine_e = load_map(effect_by[subject])
        v, affine_v = load_map(variance_by[subject])
        grids[subject] = (e.shape, affine_e)
        if v.shape != e.shape or not np.allclose(affine_v, affine_e, atol=1e-4):
            raise GroupError(f"{variance_by[subject]}: grid {v.shape} differs from the effect map "
                             f"{effect_by[subject]} {e.shape}; give maps of the same run")
        effect_maps.append(e.reshape(-1))
        variance_maps.append(v.reshape(-1))
    shape, affine = _check_grids(grids)
    effect_all = np.vstack(effect_maps).astype(np.float64)
    variance_all = np.vstack(variance_maps).astype(np.float64)
    present = np.isfinite(effect_all)
    if settings["estimation"] != "ols":
        present &= np.isfinite(variance_all) & (variance_all > 0)
    fraction = present.mean(axis=0)
    in_mask = fraction >= float(settings["mask_fraction"]) - 1e-12
    in_mask &= present.any(axis=0)
    if settings["harmonise_sites"]:
        complete = present.all(axis=0)
        dropped = int(np.sum(in_mask & ~complete))
        if dropped:
            warnings.warn(f"group: {dropped} mask voxels lack some subjects and are left out because site "
                          "harmonisation needs complete data", GlmstepsWarning, stacklevel=2)
        in_mask &= complete
    voxel_index = np.flatnonzero(in_mask).astype(np.int64)
    if voxel_index.size == 0:
        raise GroupError(f"group: no voxel is present in {settings['mask_fraction']:.0%} of the {len(kept)} "
                         "kept subjects; check the maps' masks or lower mask_fraction")
    Y = np.where(present[:, voxel_index], effect_all[:, voxel_index], np.nan)
    V = np.where(present[:, voxel_index], variance_all[:, voxel_index], np.nan)
    sites = rows[site_column].astype(str).tolist() if site_column else ["all"] * len(kept)

    qc_entered, means_entered = gm.summarise_sites(Y, sites)
    per_subject = pd.DataFrame({"subject": kept, "site": sites, "mean_effect": means_entered})
    site_qc: dict[str, Any] = {"as_entered": qc_entered.to_dict(orient="records")}
    harmonised = False
    if settings["harmonise_sites"]:
        keep_cols = [j for j, r in enumerate(design.roles) if r in ("model", "covariate")]
        result = harmonise_site_effects(Y, sites, design.matrix[:, keep_cols])
        Y = result.adjusted
        harmonised = True
        qc_after, means_after = gm.summarise_sites(Y, sites)
        per_subject["mean_effect_harmonised"] = means_after
        site_qc["harmonised"] = qc_after.to_dict(orient="records")
        site_qc["harmonisation_iterations"] = result.n_iterations
    site_qc["subjects"] = per_subject.to_dict(orient="records")
    return GroupData(subjects=kept, table=rows, Y=Y, V=V, voxel_index=voxel_index, shape=shape, affine=affine,
                     design=design, c=c, contrast_name=contrast_name, sites=sites, settings=settings,
                     excluded=excluded, task=next(iter(tasks)) if len(tasks) == 1 else None,
                     harmonised=harmonised, site_qc=site_qc, voxels_in_mask=int(voxel_index.size))


def map_block(data: GroupData, wildcards: Mapping[str, str], stat: str) -> dict[str, Any]:
    """The sidecar ``map`` block of a group map.

    ``contrast`` is ``<first-level contrast>.<group contrast>``; the parts are
    also under the sidecar's ``group`` block.
    """
    first = str(wildcards.get("contrast", ""))
    return {"level": "group", "subject": None, "session": None, "task": data.task, "run": None,
            "contrast": f"{first}.{data.contrast_name}" if first else data.contrast_name, "stat": stat}


def group_summary(data: GroupData, wildcards: Mapping[str, str]) -> dict[str, Any]:
    """The ``group`` block of every sidecar: model, subjects, exclusions, design."""
    return {
        "model": wildcards.get("model"), "first_level_contrast": wildcards.get("contrast"),
        "group_contrast": data.contrast_name,
        "contrast_weights": {n: float(w) for n, w in zip(data.design.names, data.c) if w != 0},
        "design": data.settings["design"], "design_columns": data.design.names, "design_roles": data.design.roles,
        "estimation": data.settings["estimation"], "n_subjects": len(data.subjects),
        "subjects": data.subjects, "excluded_subjects": data.excluded,
        "site_harmonisation": ("empirical-Bayes site harmonisation (Johnson, Li & Rabinovic 2007)"
                               if data.harmonised else None),
        "mask_fraction": float(data.settings["mask_fraction"]), "voxels_in_mask": data.voxels_in_mask,
    }


# ---------------------------------------------------------------------------
# statistics helpers (log space)
# ---------------------------------------------------------------------------

def _log_sf_t(t: npt.NDArray[np.float64], dof: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    """log P(T >= t) for Student t, finite where the plain value underflows.

    Notes
    -----
    Where scipy's log survival underflows, use the leading term of the incomplete
    beta series: P(T >= t) = I_x(d/2, 1/2) / 2 with x = d / (d + t^2), and
    I_x(a, b) ~ x^a (1 - x)^b / (a B(a, b)) as x -> 0 (Abramowitz & Stegun 26.5.4, 26.7.1).
    """
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        log_p = stats.t.logsf(t, dof)
        bad = ~np.isfinite(log_p) & np.isfinite(t) & (t > 0)
        if np.any(bad):
            tb, db = t[bad], dof[bad]
            a = db / 2.0
            log_x = np.log(db) - np.log(db + tb**2)
            log_1mx = np.log(tb**2) - np.log(db + tb**2)
            log_p[bad] = np.log(0.5) + a * log_x + 0.5 * log_1mx - np.log(a) - special.betaln(a, 0.5)
    return log_p


def t_to_p_z(t: npt.ArrayLike, dof: npt.ArrayLike) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """One-sided upper p and the matching z of t values, computed in log space.

    Parameters
    ----------
    t : array_like, shape (n_voxels,)
    dof : array_like, shape (n_voxels,)

    Returns
    -------
    p, z : ndarray, shape (n_voxels,)
        p = P(T >= t); z with P(Z >= z) = p. NaN where t or dof is not finite.
    """
    t = np.asarray(t, dtype=np.float64)
    dof = np.broadcast_to(np.asarray(dof, dtype=np.float64), t.shape).copy()
    ok = np.isfinite(t) & np.isfinite(dof) & (dof > 0)
    p = np.full(t.shape, np.nan)
    z = np.full(t.shape, np.nan)
    tt, dd = t[ok], dof[ok]
    log_upper = _log_sf_t(tt, dd)
    log_lower = _log_sf_t(-tt, dd)
    p[ok] = np.exp(log_upper)
    z[ok] = np.where(tt > 0, -special.ndtri_exp(log_upper), special.ndtri_exp(log_lower))
    return p, z


# ---------------------------------------------------------------------------
# the job
# ---------------------------------------------------------------------------

def fit_group_chunks(data: GroupData) -> gm.ContrastFit:
    """Fit the group contrast over the mask in chunks of voxels (I/O-layer loop)."""
    parts = []
    bad = 0
    n_vox = data.Y.shape[1]
    estimation = data.settings["estimation"]
    for start in range(0, n_vox, CHUNK_VOXELS):
        stop = min(start + CHUNK_VOXELS, n_vox)
        fit, n_bad = gm.fit_contrast_with_missing(data.design.matrix, data.Y[:, start:stop],
                                                  data.V[:, start:stop], data.c, estimation)
        parts.append(fit)
        bad += n_bad
        LOGGER.info("group fit: %d / %d voxels", stop, n_vox)
    if bad:
        warnings.warn(f"group: contrast {data.contrast_name!r} is not estimable from the subjects present at "
                      f"{bad} voxels; they are NaN", GlmstepsWarning, stacklevel=2)
    return gm.ContrastFit(**{k: np.concatenate([getattr(f, k) for f in parts])
                             for k in ("effect", "variance", "t", "dof", "between_variance")})


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Fit one group contrast and write its effect, variance, t, z, p maps and site QC.

    Sidecars hold the provenance record, the ``map`` block, the ``group``
    block (:func:`group_summary`: subjects, exclusions with reasons, design
    columns, contrast weights, estimation, harmonisation) and per-map ``dof``
    (min/max) and, for mixed models, the median between-subject variance.
    """
    missing = [k for k in ("effect", "variance", "t", "z", "p", "site_qc", "site_figure") if k not in outputs]
    if missing:
        raise GroupError(f"group rule: output(s) {missing} are not named; name every group output")
    with collect_warnings() as seen:
        data = load_group_data(inputs, params, wildcards)
        fit = fit_group_chunks(data)
        p, z = t_to_p_z(fit.t, fit.dof)
    record = build_record(STEP, params, {k: inputs[k] for k in ("effect", "variance", "participants")},
                          warnings_seen=seen)
    summary = group_summary(data, wildcards)
    finite_dof = fit.dof[np.isfinite(fit.dof)]
    summary["dof_min"] = float(finite_dof.min()) if finite_dof.size else None
    summary["dof_max"] = float(finite_dof.max()) if finite_dof.size else None
    if data.settings["estimation"] != "ols":
        tau = fit.between_variance[np.isfinite(fit.between_variance)]
        summary["between_variance_median"] = float(np.median(tau)) if tau.size else None

    qc = {"provenance": record, "group": summary, "sites": data.site_qc}
    write_json(outputs["site_qc"], qc)
    figure_record = dict(record, group=summary)
    write_sidecar(outputs["site_figure"], figure_record)
    per_subject = pd.DataFrame(data.site_qc["subjects"])
    columns = ["mean_effect"] + (["mean_effect_harmonised"] if data.harmonised else [])
    titles = ["as entered"] + (["after site harmonisation"] if data.harmonised else [])
    plot_site_effects(per_subject, outputs["site_figure"],
                      f"{summary['first_level_contrast'] or ''} {data.contrast_name}: subjects by site",
                      value_columns=columns, panel_titles=titles)
    values = {"effect": fit.effect, "variance": fit.variance, "t": fit.t, "z": z, "p": p}
    for stat in ("effect", "variance", "t", "z", "p"):
        write_sidecar(outputs[stat], record, map=map_block(data, wildcards, stat), group=summary)
        save_map(outputs[stat], values[stat], data.voxel_index, data.shape, data.affine)
