"""Group-level inputs: subjects' maps, participants rows, group mask, site harmonisation.

This module reads the files the group steps need (subjects' combined effect
and variance maps with their sidecars, ``participants.tsv``), validates them
up front and assembles one :class:`GroupData` for the maths of
:mod:`glmsteps.group` and :mod:`glmsteps.permutation`. Both group jobs
(``glmsteps.jobs.group_model`` and ``glmsteps.jobs.group_permutation``) call
:func:`load_group_data`, so they analyse exactly the same subjects and voxels.

Subjects left out (each with its reason, recorded in every group sidecar and
in ``site_qc.json``):

- no row in participants.tsv, or n/a in a column the model uses;
- no effect or no variance map;
- subject-level maps recorded as excluded (sidecar ``"excluded": true``, e.g.
  every run had too many censored volumes) or skipped (``"skipped": true``:
  the contrast was not estimable in any run).

Nothing stops unless no subject is left (or the kept subjects cannot fit the
design).

Group mask: voxels where at least ``mask_fraction`` of the kept subjects have
a finite effect (and, for the mixed models, a finite positive variance). With
``harmonise_sites`` the mask is restricted to voxels present in every kept
subject, and the first-level variances are rescaled with the effects
(:func:`glmsteps.harmonise.harmonise_variances`).
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

from . import group as gm
from . import stats
from .errors import GlmstepsWarning, GroupError
from .fileio import read_json, read_user_tsv
from .harmonise import harmonise_site_effects, harmonise_variances
from .maps import load_map, map_block
from .provenance import sidecar_path
from .settings import GroupModelSettings

LOGGER = logging.getLogger("glmsteps")

#: Voxels per chunk of the group fit (bounds the work arrays of the mixed models).
CHUNK_VOXELS = 4096
#: Longest list of voxels written to a sidecar (e.g. where REML did not converge).
MAX_LISTED_VOXELS = 1000


@dataclass(frozen=True)
class GroupData:
    """Validated group inputs, ready for the maths.

    Attributes
    ----------
    subjects : list of str
        Kept subjects (without ``sub-``), the row order of every array.
    table : DataFrame
        Their participants rows.
    Y, V : ndarray, shape (n_subjects, n_voxels)
        Effects and first-level variances at the group-mask voxels (NaN where
        a subject lacks the voxel). After site harmonisation both are in the
        harmonised units.
    voxel_index : ndarray of int, shape (n_voxels,)
        Flat C-order indices of the group-mask voxels.
    shape, affine
        Grid (voxels) and voxel-to-world transform (mm).
    design : glmsteps.group.GroupDesign
    c : ndarray, shape (n_regressors,)
    contrast_name : str
    sites : list of str
        Site of each kept subject (``"all"`` without a site column).
    settings : GroupModelSettings
        The model settings with defaults filled in.
    excluded : list of dict
        ``{"subject", "reason"}`` of every subject left out.
    task : str or None
        Task of the first-level maps when they agree.
    harmonised : bool
    site_qc : dict
        Per-site summaries (``as_entered`` and ``harmonised``), per-subject means.
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
    settings: GroupModelSettings
    excluded: list[dict[str, str]] = field(default_factory=list)
    task: str | None = None
    harmonised: bool = False
    site_qc: dict[str, Any] = field(default_factory=dict)

    @property
    def voxels_in_mask(self) -> int:
        """Number of group-mask voxels."""
        return int(self.voxel_index.size)


# ---------------------------------------------------------------------------
# settings
# ---------------------------------------------------------------------------

def group_settings(params: Mapping[str, Any] | GroupModelSettings,
                   wildcards: Mapping[str, str]) -> GroupModelSettings:
    """The model's settings (:class:`glmsteps.settings.GroupModelSettings`), its group contrast checked
    against the job's ``group_contrast`` wildcard."""
    settings = params if isinstance(params, GroupModelSettings) else GroupModelSettings.from_params(params)
    wanted = wildcards.get("group_contrast")
    if wanted is not None and str(wanted) != settings.contrast.name:
        raise GroupError(f"group params: contrast name {settings.contrast.name!r} differs from the group_contrast "
                         f"wildcard {wanted!r}; the rule must pass the contrast it names")
    return settings


# ---------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------

def normalise_subject(label: str) -> str:
    """``sub-01`` and ``01`` both become ``01``."""
    return label[4:] if label.startswith("sub-") else label


@dataclass(frozen=True)
class SubjectMap:
    """One subject-level map and what its sidecar says about it.

    Attributes
    ----------
    path : str
    subject : str
        Label without ``sub-``.
    block : dict
        The sidecar's ``map`` block.
    left_out : str or None
        Why the subject level recorded the map as excluded or skipped (None
        for a usable map).
    """

    path: str
    subject: str
    block: dict[str, Any]
    left_out: str | None


def read_subject_map(path: str) -> SubjectMap:
    """The subject, map block and exclusion status of a subject-level map (from its sidecar)."""
    side = sidecar_path(path)
    try:
        record = read_json(side)
    except FileNotFoundError as exc:
        raise GroupError(f"{side}: sidecar of {path} is missing; the group step reads the subject from its "
                         "'map' block (rerun the subject-level step)") from exc
    block = record.get("map") if isinstance(record, Mapping) else None
    if not isinstance(block, Mapping) or not block.get("subject"):
        raise GroupError(f"{side}: no 'map' block with a subject; rerun the step that wrote {path}")
    left_out = None
    for flag, word in (("excluded", "excluded"), ("skipped", "skipped")):
        if record.get(flag):
            reason = str(record.get("reason") or "no reason recorded")
            left_out = f"subject-level maps {word}: {reason}"
            break
    return SubjectMap(path=str(path), subject=normalise_subject(str(block["subject"])), block=dict(block),
                      left_out=left_out)


def subject_of_map(path: str) -> tuple[str, dict[str, Any]]:
    """Subject label (without ``sub-``) and map block from a map's JSON sidecar."""
    info = read_subject_map(path)
    return info.subject, info.block


def _maps_by_subject(paths: Sequence[str], kind: str) -> dict[str, SubjectMap]:
    found: dict[str, SubjectMap] = {}
    for path in paths:
        info = read_subject_map(path)
        if info.subject in found:
            raise GroupError(f"{path}: subject {info.subject} already has the {kind} map "
                             f"{found[info.subject].path}; give one map per subject")
        found[info.subject] = info
    return found


def read_participants(path: str, columns: Sequence[str]) -> pd.DataFrame:
    """participants.tsv indexed by subject label (without ``sub-``), checking the needed columns."""
    table = read_user_tsv(path, GroupError, "save it as a BIDS participants table")
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


def check_one_grid(grids: Mapping[str, tuple[tuple[int, ...], np.ndarray]]
                   ) -> tuple[tuple[int, int, int], np.ndarray]:
    """The grid every subject shares; GroupError naming the subjects when they differ."""
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


def _records(table: pd.DataFrame) -> list[dict[str, Any]]:
    """Rows as JSON-ready dicts: NaN (e.g. the SD of a one-subject site) becomes None."""
    return [{k: (None if isinstance(v, float) and not np.isfinite(v) else v) for k, v in row.items()}
            for row in table.to_dict(orient="records")]


def _as_list(value: Any) -> list[str]:
    return [str(value)] if isinstance(value, str) else [str(v) for v in value]


# ---------------------------------------------------------------------------
# assembly (pure, arrays in)
# ---------------------------------------------------------------------------

def group_mask(present: npt.NDArray[np.bool_], mask_fraction: float, complete_only: bool) -> npt.NDArray[np.bool_]:
    """Voxels of the group mask.

    Parameters
    ----------
    present : ndarray of bool, shape (n_subjects, n_grid_voxels)
        Where each subject has usable data.
    mask_fraction : float
        Least fraction of subjects present, in (0, 1].
    complete_only : bool
        Keep only voxels present in every subject (site harmonisation).

    Returns
    -------
    ndarray of bool, shape (n_grid_voxels,)
    """
    fraction = present.mean(axis=0)
    mask = (fraction >= float(mask_fraction) - 1e-12) & present.any(axis=0)
    return mask & present.all(axis=0) if complete_only else mask


def load_group_data(inputs: Mapping[str, Any], params: Mapping[str, Any],
                    wildcards: Mapping[str, str]) -> GroupData:
    """Read and validate every group input; build the design, contrast and group mask.

    Parameters
    ----------
    inputs : mapping
        ``effect`` and ``variance`` (lists of subject-level maps with JSON
        sidecars) and ``participants`` (participants.tsv).
    params : mapping or GroupModelSettings
        The group model settings and ``contrast`` (the job's params, or the settings made from them).
    wildcards : mapping
        ``group_contrast`` (checked against the contrast's name).

    Returns
    -------
    GroupData

    Notes
    -----
    Subjects left out are warned about (GlmstepsWarning) with their reason and
    listed in ``GroupData.excluded``; see the module docstring. Site
    harmonisation, when requested, is applied here so both group jobs analyse
    the same data, and the variances are rescaled with the effects.
    """
    settings = group_settings(params, wildcards)
    contrast_name, weights = settings.contrast.name, settings.contrast.weights
    effects = _as_list(inputs["effect"])
    variances = _as_list(inputs["variance"])
    if not effects:
        raise GroupError("group inputs: no effect maps; the group step needs one per subject")
    participants = str(inputs["participants"])
    site_column = settings.site_column
    used = [c for c in (settings.group_column, settings.pair_column, *settings.covariates) if c]
    table = read_participants(participants, used)
    if site_column and site_column not in table.columns:
        if settings.harmonise_sites:
            raise GroupError(f"{participants}: site column {site_column!r} is absent; add it or set "
                             "harmonise_sites: false")
        if settings.site_as_covariate:
            # modelling site without its column would silently fit another model than the config asks for
            raise GroupError(f"{participants}: site column {site_column!r} is absent, so site cannot be modelled "
                             "(site_as_covariate); add the column, or set site_column: null for a single-site "
                             "study")
        warnings.warn(f"{participants}: no site column {site_column!r}; the site QC treats the study as one site "
                      "(add the column, or set site_column: null for a single-site study)",
                      GlmstepsWarning, stacklevel=2)
        site_column = None
    if site_column:
        used.append(site_column)
    effect_by = _maps_by_subject(effects, "effect")
    variance_by = _maps_by_subject(variances, "variance")

    excluded: list[dict[str, str]] = []

    def exclude(subject: str, reason: str) -> None:
        excluded.append({"subject": subject, "reason": reason})
        warnings.warn(f"group: subject sub-{subject} excluded: {reason}", GlmstepsWarning, stacklevel=3)

    kept: list[str] = []
    for subject in sorted(set(effect_by) | set(variance_by) | set(table.index)):
        left_out = next((m.left_out for m in (effect_by.get(subject), variance_by.get(subject))
                         if m is not None and m.left_out), None)
        if subject not in table.index:
            exclude(subject, f"no row in {participants}")
        elif left_out:
            exclude(subject, left_out)
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
        reasons = sorted({e["reason"] for e in excluded})
        raise GroupError(f"group: no subject is left ({len(excluded)} excluded; reasons: {'; '.join(reasons)}); "
                         "check participant_id against the maps' subjects and the subject-level sidecars")
    rows = table.loc[kept]
    design = gm.build_group_design(rows, settings.design, settings.group_column, settings.pair_column,
                                   settings.covariates, site_column, settings.site_as_covariate,
                                   source=participants)
    c = gm.contrast_vector(weights, design.names, contrast_name)
    if not gm.is_estimable(design.matrix, c):
        raise GroupError(f"group contrast {contrast_name!r} is not estimable in the design {design.names}; "
                         "change its weights")

    grids: dict[str, tuple[tuple[int, ...], np.ndarray]] = {}
    effect_maps, variance_maps = [], []
    for subject in kept:
        e, affine_e = load_map(effect_by[subject].path)
        v, affine_v = load_map(variance_by[subject].path)
        grids[subject] = (e.shape, affine_e)
        if v.shape != e.shape or not np.allclose(affine_v, affine_e, atol=1e-4):
            raise GroupError(f"{variance_by[subject].path}: grid {v.shape} differs from the effect map "
                             f"{effect_by[subject].path} {e.shape}; give maps of the same subject and contrast")
        effect_maps.append(e.reshape(-1))
        variance_maps.append(v.reshape(-1))
    shape, affine = check_one_grid(grids)
    effect_all = np.vstack(effect_maps).astype(np.float64)
    variance_all = np.vstack(variance_maps).astype(np.float64)
    present = np.isfinite(effect_all)
    if settings.estimation != "ols":
        present &= np.isfinite(variance_all) & (variance_all > 0)
    loose = group_mask(present, settings.mask_fraction, complete_only=False)
    in_mask = group_mask(present, settings.mask_fraction, complete_only=settings.harmonise_sites)
    dropped = int(np.sum(loose & ~in_mask))
    if dropped:
        warnings.warn(f"group: {dropped} mask voxels lack some subjects and are left out because site "
                      "harmonisation needs complete data", GlmstepsWarning, stacklevel=2)
    voxel_index = np.flatnonzero(in_mask).astype(np.int64)
    if voxel_index.size == 0:
        raise GroupError(f"group: no voxel is present in {settings.mask_fraction:.0%} of the {len(kept)} "
                         "kept subjects; check the maps' masks or lower mask_fraction")
    Y = np.where(present[:, voxel_index], effect_all[:, voxel_index], np.nan)
    V = np.where(present[:, voxel_index], variance_all[:, voxel_index], np.nan)
    sites = rows[site_column].astype(str).tolist() if site_column else ["all"] * len(kept)

    qc_entered, means_entered = gm.summarise_sites(Y, sites)
    per_subject = pd.DataFrame({"subject": kept, "site": sites, "mean_effect": means_entered})
    site_qc: dict[str, Any] = {"as_entered": _records(qc_entered)}
    harmonised = False
    if settings.harmonise_sites:
        keep_cols = [j for j, r in enumerate(design.roles) if r in ("model", "covariate")]
        result = harmonise_site_effects(Y, sites, design.matrix[:, keep_cols])
        Y = result.adjusted
        V = harmonise_variances(V, result)
        harmonised = True
        qc_after, means_after = gm.summarise_sites(Y, sites)
        per_subject["mean_effect_harmonised"] = means_after
        site_qc["harmonised"] = _records(qc_after)
        site_qc["harmonisation_iterations"] = result.n_iterations
        site_qc["variances"] = ("first-level variances rescaled with the effects: V x effect_scale^2, "
                                "effect_scale = 1 / sqrt(delta*^2) of the subject's site and voxel")
    site_qc["subjects"] = _records(per_subject)
    tasks = {m.block.get("task") for m in effect_by.values() if m.subject in kept}
    return GroupData(subjects=kept, table=rows, Y=Y, V=V, voxel_index=voxel_index, shape=shape, affine=affine,
                     design=design, c=c, contrast_name=contrast_name, sites=sites, settings=settings,
                     excluded=excluded, task=next(iter(tasks)) if len(tasks) == 1 else None,
                     harmonised=harmonised, site_qc=site_qc)


# ---------------------------------------------------------------------------
# fitting over chunks and describing the result
# ---------------------------------------------------------------------------

def fit_group_chunks(data: GroupData, chunk_voxels: int = CHUNK_VOXELS) -> gm.ContrastFit:
    """Fit the group contrast over the mask, ``chunk_voxels`` voxels at a time.

    The result does not depend on the chunk size beyond rounding (voxels are
    fitted independently); tests/test_jobs_group.py checks it.
    """
    parts = []
    bad = 0
    n_vox = data.Y.shape[1]
    estimation = data.settings.estimation
    for start in range(0, n_vox, chunk_voxels):
        stop = min(start + chunk_voxels, n_vox)
        fit, n_bad = gm.fit_contrast_with_missing(data.design.matrix, data.Y[:, start:stop],
                                                  data.V[:, start:stop], data.c, estimation)
        parts.append(fit)
        bad += n_bad
        LOGGER.info("group fit: %d / %d voxels", stop, n_vox)
    if bad:
        warnings.warn(f"group: contrast {data.contrast_name!r} is not estimable from the subjects present at "
                      f"{bad} voxels; they are NaN", GlmstepsWarning, stacklevel=2)
    return gm.ContrastFit(**{k: np.concatenate([getattr(f, k) for f in parts])
                             for k in ("effect", "variance", "t", "dof", "between_variance", "converged")})


def group_pz(fit: gm.ContrastFit, tail: stats.Tail) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """p for ``tail`` and the signed z of the group t map (log space, :mod:`glmsteps.stats`)."""
    log_p = stats.t_logpvalue(fit.t, fit.dof, tail)
    return np.exp(log_p), stats.t_to_z(fit.t, fit.dof)


def group_map_block(data: GroupData, wildcards: Mapping[str, str], stat: str) -> dict[str, Any]:
    """The sidecar ``map`` block of a group map (:func:`glmsteps.maps.map_block`).

    ``contrast`` is ``<first-level contrast>.<group contrast>``; the parts are
    also under the sidecar's ``group`` block.
    """
    first = str(wildcards.get("contrast", ""))
    return map_block("group", None, None, data.task, None,
                     f"{first}.{data.contrast_name}" if first else data.contrast_name, stat)


def group_summary(data: GroupData, wildcards: Mapping[str, str]) -> dict[str, Any]:
    """The ``group`` block of every sidecar: model, subjects, exclusions (with reasons), design."""
    return {
        "model": wildcards.get("model"), "first_level_contrast": wildcards.get("contrast"),
        "group_contrast": data.contrast_name,
        "contrast_weights": {n: float(w) for n, w in zip(data.design.names, data.c) if w != 0},
        "design": data.settings.design, "design_columns": data.design.names, "design_roles": data.design.roles,
        "estimation": data.settings.estimation, "tail": data.settings.tail,
        "n_subjects": len(data.subjects), "subjects": data.subjects,
        "n_excluded": len(data.excluded), "excluded_subjects": data.excluded,
        "site_harmonisation": ("empirical-Bayes site harmonisation (Johnson, Li & Rabinovic 2007); first-level "
                               "variances rescaled with the effects" if data.harmonised else None),
        "mask_fraction": float(data.settings.mask_fraction), "voxels_in_mask": data.voxels_in_mask,
    }


def fit_summary(data: GroupData, fit: gm.ContrastFit) -> dict[str, Any]:
    """Sidecar fields that describe a group fit: dof range, tau^2, inference, REML convergence."""
    finite_dof = fit.dof[np.isfinite(fit.dof)]
    summary: dict[str, Any] = {"dof_min": float(finite_dof.min()) if finite_dof.size else None,
                               "dof_max": float(finite_dof.max()) if finite_dof.size else None}
    estimation = data.settings.estimation
    if estimation == "ols":
        summary["inference"] = "OLS t on n - rank(X) degrees of freedom (summary statistics)"
        return summary
    tau = fit.between_variance[np.isfinite(fit.between_variance)]
    summary["between_variance_median"] = float(np.median(tau)) if tau.size else None
    summary["inference"] = gm.MIXED_INFERENCE
    if estimation == "mixed_reml":
        failed = np.flatnonzero(~fit.converged & np.isfinite(fit.t))
        listed = data.voxel_index[failed[:MAX_LISTED_VOXELS]]
        summary["reml"] = {
            "method": "global maximum of the restricted likelihood: scan of the score, then safeguarded Newton "
                      "in each bracket",
            "voxels_not_converged": int(failed.size),
            "not_converged_ijk": [[int(i) for i in np.unravel_index(int(v), data.shape)] for v in listed],
            "listed": f"first {min(failed.size, MAX_LISTED_VOXELS)} of {failed.size}",
        }
    return summary
