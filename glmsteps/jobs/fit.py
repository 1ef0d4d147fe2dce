"""Step ``fit``: fit every in-mask voxel of a run and store the fit as HDF5.

Inputs (named)
    ``bold`` (4D NIfTI), ``mask`` (3D NIfTI on the BOLD grid), ``design`` (TSV,
    one column per regressor, one row per kept volume), ``design_summary``
    (JSON with per-column ``names``, ``roles``, ``conditions``, ``basis``, and
    ``first_volume``, ``n_volumes``, ``excluded``); optional ``tissue`` (3D
    NIfTI of integer tissue labels on the BOLD grid, 0 = unlabelled).
Params
    ``scaling`` (percent | grand_mean | none), ``grand_mean_value``,
    ``autocorrelation`` (ols | ar1 | arp), ``ar_order`` (1..12),
    ``ar_smoothing_fwhm_mm`` (>= 0), ``ar_bin_width``, ``non_finite_voxels``
    (error | drop): :class:`glmsteps.settings.FitSettings` (missing keys take the defaults of
    ``config/schema.yaml``); the run's TR is read from the design summary (``repetition_time_s``, set by
    the TR rule of ``glmsteps.acquisition``).
Outputs (named)
    ``fit`` (fit.h5, sidecar fit.json), ``mean``, ``residual_sd``, ``ar_coef``
    (NIfTI, each with its sidecar).

Read, fit (``glmsteps.fitting.fit_voxels``), write. Everything a user can get
wrong is checked before any file is written. The BOLD is read once, streamed
and masked (``glmsteps.volumes``); its bytes are hashed on the way and that
hash goes into the provenance record. The voxels are fitted in chunks of
``GLMSTEPS_CHUNK_VOXELS`` voxels (environment variable, default 4096 shared by
the job's threads); results do not depend on the chunk size.
"""

from __future__ import annotations

import logging
import os
import time
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from .. import estimation as est
from .. import provenance
from ..bids import parse_run_id
from ..errors import ConfigError, DataError, DesignError, GlmstepsWarning
from ..fileio import read_json, read_numeric_tsv
from ..fitstore import StoredFit, write_fit
from ..fitting import NoiseSettings, VoxelFit, VoxelGrid, fit_voxels
from ..maps import map_block, map_description, save_map, statistic_intent
from ..settings import FitSettings
from ..volumes import (AFFINE_TOLERANCE_MM, check_grid, read_bold_header, read_mask,
                       stream_masked)

STEP = "fit"
#: Default number of voxels per chunk (override with the GLMSTEPS_CHUNK_VOXELS environment variable).
DEFAULT_CHUNK_VOXELS = 4096
_SUMMARY_KEYS = ("names", "roles", "conditions", "basis", "first_volume", "n_volumes", "excluded", "repetition_time_s")

logger = logging.getLogger("glmsteps")


def smoothing_fwhm_mm(settings: FitSettings, voxel_size_mm: npt.ArrayLike) -> float:
    """The AR smoothing FWHM (mm) of a run: the configured value, else twice its voxel size."""
    if settings.ar_smoothing_fwhm_mm is not None:
        return settings.ar_smoothing_fwhm_mm
    return est.default_smoothing_fwhm_mm(voxel_size_mm)


def chunk_voxels(threads: int = 1) -> int:
    """Voxels per chunk: ``GLMSTEPS_CHUNK_VOXELS`` if set to a positive integer, else
    4096 shared by the job's threads (at least 1024 each), so that the chunks in
    flight need about the same work memory whatever the threads."""
    default = max(DEFAULT_CHUNK_VOXELS // max(threads, 1), 1024)
    text = os.environ.get("GLMSTEPS_CHUNK_VOXELS", "")
    try:
        value = int(text)
    except ValueError:
        return default
    return value if value > 0 else default


# ---------------------------------------------------------------------------
# design inputs
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class DesignInput:
    """The design as read and checked."""

    X: npt.NDArray[np.float64]
    names: list[str]
    roles: list[str]
    conditions: list[str]
    basis: list[str]
    first_volume: int
    n_volumes: int
    excluded: bool
    repetition_time_s: float


def read_design(design_path: str, summary_path: str) -> DesignInput:
    """Read and check the design TSV and its summary JSON.

    Raises
    ------
    DataError
    """
    try:
        summary = read_json(summary_path)
    except (OSError, ValueError) as exc:
        raise DataError(f"{summary_path}: cannot read design summary ({exc}); rerun build_design") from exc
    missing = [k for k in _SUMMARY_KEYS if not isinstance(summary, dict) or k not in summary]
    if missing:
        raise DataError(f"{summary_path}: design summary lacks {missing}; rerun build_design")
    names = [str(n) for n in summary["names"]]
    roles = [str(r) for r in summary["roles"]]
    if len(roles) != len(names):
        raise DataError(f"{summary_path}: {len(names)} names but {len(roles)} roles; rerun build_design")
    try:
        columns, X = read_numeric_tsv(design_path)
    except (OSError, ValueError) as exc:
        raise DataError(f"{design_path}: cannot read design TSV as numbers ({exc}); rerun build_design") from exc
    if columns != names:
        raise DataError(f"{design_path}: columns {columns[:6]}... do not match the summary names "
                        f"{names[:6]}... of {summary_path}; rerun build_design")
    bad = np.argwhere(~np.isfinite(X))
    if bad.size:
        r, c = bad[0]
        raise DataError(f"{design_path}: row {r + 1}, column {names[c]}: value is not finite; rerun build_design")
    columns_of = {}
    for key in ("conditions", "basis"):
        value = summary[key]
        if not isinstance(value, list) or len(value) != len(names):
            raise DataError(f"{summary_path}: {key} must list one entry per design column ({len(names)}), "
                            f"found {value!r:.60}; rerun build_design")
        columns_of[key] = [str(c) if c is not None else "" for c in value]
    conditions, basis = columns_of["conditions"], columns_of["basis"]
    first, n_vol = int(summary["first_volume"]), int(summary["n_volumes"])
    excluded = bool(summary["excluded"])
    if not excluded and X.shape[0] != n_vol - first:
        raise DataError(f"{design_path}: {X.shape[0]} rows but the summary says {n_vol} volumes from volume "
                        f"{first} ({n_vol - first} kept); rerun build_design")
    tr = summary["repetition_time_s"]
    if isinstance(tr, bool) or not isinstance(tr, (int, float)) or not tr > 0:
        raise DataError(f"{summary_path}: repetition_time_s is {tr!r}, expected a positive number of seconds; "
                        "rerun build_design")
    return DesignInput(X=X, names=names, roles=roles, conditions=conditions, basis=basis, first_volume=first,
                       n_volumes=n_vol, excluded=excluded, repetition_time_s=float(tr))


# ---------------------------------------------------------------------------
# tissue classes
# ---------------------------------------------------------------------------

def _optional_input(inputs: Mapping[str, str | list[str]], key: str) -> str | None:
    """An optional named input: absent, ``""`` or an empty list mean not given."""
    value = inputs.get(key)
    if isinstance(value, list):
        if len(value) > 1:
            raise ConfigError(f"rule fit: input {key!r} must be one file, found {len(value)}")
        value = value[0] if value else None
    return str(value) if value else None


def read_tissue(path: str, bold: Any) -> npt.NDArray[np.int64]:
    """Read a tissue label map on the BOLD grid (integer labels >= 0; 0 = unlabelled).

    Raises
    ------
    DataError
        If the file cannot be read, is not 3D on the BOLD grid, or holds values that are not
        whole numbers from 0 to 999.
    """
    import nibabel as nib

    try:
        img = nib.load(path)
        data = np.asarray(img.dataobj, dtype=np.float64)
    except Exception as exc:  # nibabel raises many kinds for a bad file
        raise DataError(f"{path}: cannot read the tissue map ({exc}); pass a NIfTI label map") from exc
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.shape != tuple(bold.shape[:3]):
        raise DataError(f"{path}: tissue map grid {data.shape} differs from BOLD grid {bold.shape[:3]} of "
                        f"{bold.path}; resample the tissue map to the BOLD (nearest neighbour)")
    diff = float(np.max(np.abs(np.asarray(img.affine, dtype=np.float64) - bold.affine)))
    if diff > AFFINE_TOLERANCE_MM:
        raise DataError(f"{path}: tissue map affine differs from the BOLD affine of {bold.path} by up to "
                        f"{diff:.4g} mm (tolerance {AFFINE_TOLERANCE_MM} mm); resample the tissue map to the BOLD")
    bad = ~np.isfinite(data) | (data != np.round(data)) | (data < 0) | (data > 999)
    if bad.any():
        i = tuple(int(x) for x in np.argwhere(bad)[0])
        raise DataError(f"{path}: voxel {i} of the tissue map is {data[i]!r}, expected a whole-number label from "
                        "0 to 999 (0 = unlabelled); pass a label map, not probabilities")
    return data.astype(np.int64)


def _map_block(wildcards: Mapping[str, str], stat: str) -> dict[str, Any]:
    w = dict(wildcards)
    subject = str(w.get("subject", ""))
    if "run_id" in w:
        key = parse_run_id(subject, str(w["run_id"]))
        session, task, run = key.session, key.task, key.run
    else:
        session, task, run = str(w.get("session", "")), str(w.get("task", "")), str(w.get("run", ""))
    return map_block("run", subject, session or None, task, run, None, stat)


# ---------------------------------------------------------------------------
# the job
# ---------------------------------------------------------------------------

def run(inputs: Mapping[str, str | list[str]], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Fit one run (see the module docstring for the interface)."""
    t_start = time.perf_counter()
    settings = FitSettings.from_params(params)
    for key in ("bold", "mask", "design", "design_summary"):
        if key not in inputs:
            raise ConfigError(f"rule fit: input {key!r} is missing; name the inputs bold, mask, design, design_summary")
    for key in ("fit", "mean", "residual_sd", "ar_coef"):
        if key not in outputs:
            raise ConfigError(f"rule fit: output {key!r} is missing; name the outputs fit, mean, residual_sd, ar_coef")
    bold_path, mask_path = str(inputs["bold"]), str(inputs["mask"])
    in_paths = {k: str(inputs[k]) for k in ("bold", "mask", "design", "design_summary")}
    tissue_path = _optional_input(inputs, "tissue")
    if tissue_path:
        in_paths["tissue"] = tissue_path
    extra: dict[str, Any] = {}
    with provenance.collect_warnings() as seen:
        # --- every check before anything is written -------------------------------------------
        design_in = read_design(in_paths["design"], in_paths["design_summary"])
        bold = read_bold_header(bold_path)
        mask, mask_affine = read_mask(mask_path)
        check_grid(mask_path, mask.shape, mask_affine, bold)
        tissue = read_tissue(tissue_path, bold) if tissue_path else None
        shape3 = tuple(int(s) for s in bold.shape[:3])
        if design_in.excluded:
            fit, extra = _excluded_fit(design_in, bold, settings)
        else:
            if bold.shape[3] != design_in.n_volumes:
                raise DataError(f"{bold_path}: {bold.shape[3]} volumes but the design summary "
                                f"{in_paths['design_summary']} says {design_in.n_volumes}; "
                                "check that the events, confounds and BOLD belong to the same run")
            try:
                design = est.prepare_design(design_in.X, design_in.roles)
            except DesignError as exc:
                raise DesignError(f"{in_paths['design']}: {exc}") from exc
            order = 1
            if settings.autocorrelation == "arp":
                order = est.check_ar_order(design, settings.ar_order)
                if order < settings.ar_order:
                    warnings.warn(f"{in_paths['design']}: AR({settings.ar_order}) does not fit a design with "
                                  f"{design.dof} residual degrees of freedom (it needs "
                                  f"{est.MIN_DOF_PER_AR_COEFFICIENT} per coefficient); using AR({order})",
                                  GlmstepsWarning, stacklevel=2)
            # --- read -----------------------------------------------------------------------------
            t_read = time.perf_counter()
            # passed on without a name here, so that fit_voxels can release the data after its first pass
            fit, extra = _fit_run(stream_masked(bold, mask, design_in.first_volume, threads=threads,
                                                voxel_order="disk"), mask, tissue, bold,
                                  design_in, design, settings, order, bold_path, time.perf_counter() - t_read,
                                  threads)
    t_fit_end = time.perf_counter()
    lag1 = extra.pop("_qc_lag1", None)
    sha = extra.pop("sha256_bold", None)
    timing = dict(extra.pop("timing_s", {}))
    if "timing_s_fit" in extra:
        timing["fit"] = extra.pop("timing_s_fit")
    timing["total_before_write"] = round(t_fit_end - t_start, 3)
    record = provenance.build_record(STEP, params, in_paths, list(seen), precomputed={"bold": sha} if sha else None,
                                     **extra)
    fit.attrs.update({"autocorrelation": settings.autocorrelation, "scaling": settings.scaling,
                      "repetition_time_s": design_in.repetition_time_s})
    # --- write: sidecar first, then the fit, then the QC maps ----------------------------------------
    provenance.write_sidecar(outputs["fit"], record, timing_s=timing)
    write_fit(outputs["fit"], fit, record)
    qc = _qc_values(fit, lag1)
    for name in ("mean", "residual_sd", "ar_coef"):
        values, index = qc[name]
        provenance.write_sidecar(outputs[name], record, map=_map_block(wildcards, name))
        save_map(outputs[name], values, index, shape3, bold.affine, intent=statistic_intent(name),
                 description=map_description(name, None, "run"))
    logger.info("fit written to %s in %.2f s", outputs["fit"], time.perf_counter() - t_start)


def _fit_run(series: Any, mask: npt.NDArray[np.bool_], tissue: npt.NDArray[np.int64] | None, bold: Any,
             design_in: DesignInput, design: est.DesignFactors, settings: FitSettings, order: int,
             bold_path: str, read_s: float, threads: int = 1) -> tuple[StoredFit, dict[str, Any]]:
    logger.info("read %s: %d volumes x %d in-mask voxels in %.2f s", bold_path, series.Y.shape[0],
                series.Y.shape[1], read_s)
    flat_c = series.flat_index  # grid index of each column (columns in the order the file stores them)
    mean = series.mean
    finite = np.isfinite(series.minimum) & np.isfinite(series.maximum) & np.isfinite(mean)
    non_finite = ~finite
    if non_finite.any() and settings.non_finite_voxels == "error":
        first = np.unravel_index(int(flat_c[np.flatnonzero(non_finite)[0]]), mask.shape)
        raise DataError(f"{bold_path}: {int(non_finite.sum())} of {flat_c.size} in-mask voxels have a non-finite "
                        f"value (NaN or inf) in at least one volume (the first at voxel "
                        f"{tuple(int(i) for i in first)}); fix the BOLD or the mask, or set "
                        "fit.non_finite_voxels: drop to fit without these voxels")
    if non_finite.any():
        warnings.warn(f"{bold_path}: dropped {int(non_finite.sum())} of {flat_c.size} in-mask voxels with a "
                      "non-finite value (NaN or inf) in at least one volume (fit.non_finite_voxels: drop)",
                      GlmstepsWarning, stacklevel=2)
    zero_var = finite & (series.minimum == series.maximum)
    nonpos = finite & ~zero_var & (mean <= 0) if settings.scaling == "percent" else np.zeros_like(finite)
    data = [series.Y]
    sha256 = series.sha256
    del series  # from here on only ``data`` holds the signal, so fit_voxels can release it
    fitted = finite & ~zero_var & ~nonpos
    counts = {"outside_mask": int(mask.size - flat_c.size), "non_finite": int(non_finite.sum()),
              "zero_variance": int(zero_var.sum()), "nonpositive_mean": int(nonpos.sum()),
              "fitted": int(fitted.sum())}
    logger.info("voxels: %s", ", ".join(f"{k} {v}" for k, v in counts.items()))
    if counts["fitted"] == 0:
        raise DataError(f"{bold_path}: no voxel of the mask can be fitted ({counts['non_finite']} not finite, "
                        f"{counts['zero_variance']} constant, {counts['nonpositive_mean']} with mean <= 0); "
                        "check the BOLD and the mask")
    columns = np.flatnonzero(fitted)
    voxel_index = flat_c[columns]
    if settings.scaling == "grand_mean" and not mean[columns].mean() > 0:
        raise DataError(f"{bold_path}: the mean signal over the mask is {mean[columns].mean():g}, "
                        "grand-mean scaling needs a positive mean; use scaling: none")
    factors = est.compute_scale_factors(mean[columns], settings.scaling, settings.grand_mean_value)
    grid = VoxelGrid(shape=tuple(int(s) for s in mask.shape), flat_index=voxel_index,
                     voxel_size_mm=np.asarray(bold.voxel_size_mm, dtype=np.float64),
                     classes=None if tissue is None else tissue.ravel()[voxel_index])
    noise = NoiseSettings(autocorrelation=settings.autocorrelation, order=order,
                          smoothing_fwhm_mm=smoothing_fwhm_mm(settings, bold.voxel_size_mm),
                          bin_width=settings.ar_bin_width)
    t0 = time.perf_counter()
    vf = fit_voxels(data, columns, factors, design, noise, chunk_voxels(threads), grid, threads=threads)
    grid_order = np.argsort(voxel_index, kind="stable")  # the fit is stored in C order
    vf, voxel_index = _reorder(vf, grid_order), voxel_index[grid_order]
    fit_s = time.perf_counter() - t0
    mean_image = np.full(mask.shape, np.nan, dtype=np.float32)
    mean_image.flat[flat_c] = mean.astype(np.float32)
    fit = StoredFit(shape=tuple(int(s) for s in mask.shape), affine=bold.affine, voxel_index=voxel_index,
                    design=design.X, names=design_in.names, roles=design_in.roles, conditions=design_in.conditions,
                    basis=design_in.basis, beta=vf.beta, residual_variance=vf.residual_variance,
                    dof=np.full(columns.size, design.dof, dtype=np.float32), ar_coef=vf.ar_coef, bin=vf.bin,
                    bin_covariance=vf.bin_covariance, bin_rho=vf.bin_rho, mean_image=mean_image, excluded=False,
                    attrs={"status_counts": counts, "ar_order": int(vf.order), "rank": int(design.rank)})
    extra = {"excluded": False, "voxel_counts": counts, "dropped_non_finite_voxels": counts["non_finite"],
             "autocorrelation": settings.autocorrelation, "ar_order": int(vf.order),
             "ar_smoothing_fwhm_mm_used": noise.smoothing_fwhm_mm, "dof": int(design.dof),
             "rank": int(design.rank), "n_bins": int(vf.bin_rho.size),
             "n_tissue_classes": None if tissue is None else int(np.unique(grid.classes).size),
             "n_volumes_fitted": int(design.X.shape[0]), "n_censored": int(design.censored.sum()),
             "scaling": settings.scaling, "grand_mean_value": settings.grand_mean_value,
             "timing_s_fit": round(fit_s, 3),
             "_qc_lag1": vf.lag1, "timing_s": {"read": round(read_s, 3)}, "sha256_bold": sha256}
    return fit, extra


def _reorder(vf: VoxelFit, order: npt.NDArray[np.integer]) -> VoxelFit:
    """``vf`` with its voxels taken in ``order``."""
    return VoxelFit(beta=vf.beta[:, order], residual_variance=vf.residual_variance[order],
                    ar_coef=vf.ar_coef[order], lag1=vf.lag1[order], bin=vf.bin[order], bin_rho=vf.bin_rho,
                    bin_covariance=vf.bin_covariance, order=vf.order)


def _excluded_fit(design_in: DesignInput, bold: Any, settings: FitSettings) -> tuple[StoredFit, dict[str, Any]]:
    p = len(design_in.names)
    shape3 = tuple(int(s) for s in bold.shape[:3])
    empty = np.zeros(0, dtype=np.float32)
    fit = StoredFit(shape=shape3, affine=bold.affine, voxel_index=np.zeros(0, dtype=np.int64), design=design_in.X,
                    names=design_in.names, roles=design_in.roles, conditions=design_in.conditions,
                    basis=design_in.basis, beta=np.zeros((p, 0), dtype=np.float32), residual_variance=empty,
                    dof=empty, ar_coef=np.zeros((0, 1), dtype=np.float32), bin=np.zeros(0, dtype=np.int32),
                    bin_covariance=np.zeros((0, p, p)), bin_rho=np.zeros(0),
                    mean_image=np.full(shape3, np.nan, dtype=np.float32), excluded=True,
                    attrs={"status_counts": {}})
    extra = {"excluded": True, "autocorrelation": settings.autocorrelation, "voxel_counts": {}, "n_bins": 0, "dof": None}
    return fit, extra


def _qc_values(fit: StoredFit, lag1: np.ndarray | None) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    if fit.excluded:
        none = (np.zeros(0, dtype=np.float32), np.zeros(0, dtype=np.int64))
        return {"mean": none, "residual_sd": none, "ar_coef": none}
    finite_mean = np.flatnonzero(np.isfinite(fit.mean_image.ravel()))
    ar = fit.ar_coef[:, 0] if fit.attrs.get("autocorrelation") != "ols" or lag1 is None else lag1
    return {"mean": (fit.mean_image.ravel()[finite_mean], finite_mean),
            "residual_sd": (np.sqrt(fit.residual_variance), fit.voxel_index),
            "ar_coef": (ar, fit.voxel_index)}
