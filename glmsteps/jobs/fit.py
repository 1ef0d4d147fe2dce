"""Step ``fit``: fit every in-mask voxel of a run and store the fit as HDF5.

Inputs (named)
    ``bold`` (4D NIfTI), ``mask`` (3D NIfTI on the BOLD grid), ``design`` (TSV,
    one column per regressor, one row per kept volume), ``design_summary``
    (JSON with ``names``, ``roles``, ``conditions``, ``basis``,
    ``first_volume``, ``n_volumes``, ``excluded``).
Params
    ``scaling`` (percent | grand_mean | none), ``grand_mean_value``,
    ``autocorrelation`` (ols | ar1 | arp), ``ar_order`` (1..4),
    ``ar_smoothing_fwhm_mm`` (>= 0), ``ar_bin_width``, ``repetition_time_s``.
Outputs (named)
    ``fit`` (fit.h5, sidecar fit.json), ``mean``, ``residual_sd``, ``ar_coef``
    (NIfTI, each with its sidecar).

Everything a user can get wrong is checked before any file is written. The
BOLD is read once, streamed and masked (``glmsteps.volumes``); its bytes are
hashed on the way and that hash goes into the provenance record. The voxel
loop runs in chunks of ``GLMSTEPS_CHUNK_VOXELS`` voxels (environment variable,
default 4096); results do not depend on the chunk size.
"""

from __future__ import annotations

import logging
import os
import time
import warnings
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
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
from ..maps import save_map
from ..volumes import check_grid, check_repetition_time, read_bold_header, read_mask, stream_masked

STEP = "fit"
#: Default number of voxels per chunk (override with the GLMSTEPS_CHUNK_VOXELS environment variable).
DEFAULT_CHUNK_VOXELS = 4096
_SUMMARY_KEYS = ("names", "roles", "conditions", "basis", "first_volume", "n_volumes", "excluded")

logger = logging.getLogger("glmsteps")


@dataclass(frozen=True)
class FitSettings:
    """Checked step parameters."""

    scaling: est.ScalingMethod
    grand_mean_value: float
    autocorrelation: est.NoiseModel
    ar_order: int
    ar_smoothing_fwhm_mm: float
    ar_bin_width: float
    repetition_time_s: float


def check_params(params: Mapping[str, Any]) -> FitSettings:
    """Check the step's params; missing keys take their defaults.

    Raises
    ------
    ConfigError
    """
    p = dict(params)
    scaling = p.get("scaling", "percent")
    if scaling not in ("percent", "grand_mean", "none"):
        raise ConfigError(f"config fit.scaling: expected percent, grand_mean or none, found {scaling!r}")
    noise = p.get("autocorrelation", "ar1")
    if noise not in ("ols", "ar1", "arp"):
        raise ConfigError(f"config fit.autocorrelation: expected ols, ar1 or arp, found {noise!r}")
    try:
        gm = float(p.get("grand_mean_value", 100.0))
        order = int(p.get("ar_order", 1))
        fwhm = float(p.get("ar_smoothing_fwhm_mm", 0.0))
        width = float(p.get("ar_bin_width", 0.01))
        tr = float(p["repetition_time_s"])
    except KeyError as exc:
        raise ConfigError("config repetition_time_s: missing; set the TR of the runs in seconds") from exc
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"config fit: a numeric setting is not a number ({exc}); fix the value") from exc
    if not (gm > 0 and np.isfinite(gm)):
        raise ConfigError(f"config fit.grand_mean_value: expected a positive number, found {gm}")
    if not 1 <= order <= est.MAX_AR_ORDER:
        raise ConfigError(f"config fit.ar_order: expected 1 to {est.MAX_AR_ORDER}, found {order}")
    if not (fwhm >= 0 and np.isfinite(fwhm)):
        raise ConfigError(f"config fit.ar_smoothing_fwhm_mm: expected a number >= 0 (mm), found {fwhm}")
    if not 0 < width <= 0.1:
        raise ConfigError(f"config fit.ar_bin_width: expected a number in (0, 0.1], found {width}")
    if not (tr > 0 and np.isfinite(tr)):
        raise ConfigError(f"config repetition_time_s: expected a positive number of seconds, found {tr}")
    return FitSettings(scaling=scaling, grand_mean_value=gm, autocorrelation=noise,
                       ar_order=order if noise == "arp" else 1, ar_smoothing_fwhm_mm=fwhm, ar_bin_width=width,
                       repetition_time_s=tr)


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


def _column_condition(name: str, conditions: list[str]) -> str:
    for cond in sorted(conditions, key=len, reverse=True):
        if name == cond or name.startswith(cond + "__"):
            return cond
    return ""


def _column_basis(name: str, cond: str) -> str:
    if not cond:
        return ""
    if name == cond:
        return "main"
    suffix = name[len(cond) + 2:]
    return "modulator" if suffix.startswith("x_") else suffix


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
    conds = [str(c) for c in summary["conditions"]]
    conditions = [_column_condition(n, conds) for n in names]
    basis_in = summary["basis"]
    basis = ([str(b) if b is not None else "" for b in basis_in] if isinstance(basis_in, list)
             and len(basis_in) == len(names) else [_column_basis(n, c) for n, c in zip(names, conditions)])
    first, n_vol = int(summary["first_volume"]), int(summary["n_volumes"])
    excluded = bool(summary["excluded"])
    if not excluded and X.shape[0] != n_vol - first:
        raise DataError(f"{design_path}: {X.shape[0]} rows but the summary says {n_vol} volumes from volume "
                        f"{first} ({n_vol - first} kept); rerun build_design")
    return DesignInput(X=X, names=names, roles=roles, conditions=conditions, basis=basis, first_volume=first,
                       n_volumes=n_vol, excluded=excluded)


# ---------------------------------------------------------------------------
# the chunked fit (I/O layer: the loop over voxels lives here)
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class VoxelFit:
    """Per-voxel results of :func:`fit_voxels` (v fitted voxels)."""

    beta: npt.NDArray[np.float32]                 # (p, v)
    residual_variance: npt.NDArray[np.float32]    # (v,)
    ar_coef: npt.NDArray[np.float32]              # (v, order), zeros for OLS
    lag1: npt.NDArray[np.float32]                 # (v,) corrected lag-1 autocorrelation (QC map)
    bin: npt.NDArray[np.int32]                    # (v,)
    bin_rho: npt.NDArray[np.float64]              # (b,)
    bin_covariance: npt.NDArray[np.float64]       # (b, p, p)
    order: int


def _log_progress(label: str, done: int, total: int, start: float) -> None:
    elapsed = time.perf_counter() - start
    left = elapsed / done * (total - done) if done else float("nan")
    logger.info("%s: %d/%d voxels, %.1f s elapsed, about %.1f s left", label, done, total, elapsed, left)


def _for_each_chunk(work: Callable[[int], slice], starts: range, threads: int, label: str, total: int) -> None:
    """Call ``work(start)`` for every chunk start, logging progress.

    With ``threads`` > 1 the chunks run in a pool of that many threads: each
    chunk writes its own columns of preallocated arrays, and numpy releases the
    GIL in its matrix products and element-wise loops, so chunks overlap. Each
    chunk's arithmetic is the same whatever the pool, so the results are too.
    Progress is logged in chunk order.

    Snakemake gives a job's BLAS as many threads as the job has
    (``OPENBLAS_NUM_THREADS``); inside the pool each product runs on one BLAS
    thread instead, or the pool's threads and BLAS's fight over the cores
    (measured on the 64x64x40x300 benchmark run: fit phase 0.23 s with one
    BLAS thread per chunk, 0.41-0.50 s with two).
    """
    t0 = time.perf_counter()
    if threads <= 1 or len(starts) < 2:
        for s in starts:
            _log_progress(label, work(s).stop, total, t0)
        return
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"), \
            ThreadPoolExecutor(max_workers=threads, thread_name_prefix="glmsteps-fit") as pool:
        for sl in pool.map(work, starts):
            _log_progress(label, sl.stop, total, t0)


def fit_voxels(Y: npt.NDArray[np.floating] | list[npt.NDArray[np.floating]], columns: npt.NDArray[np.integer],
               factors: npt.NDArray[np.floating],
               design: est.DesignFactors, settings: FitSettings, order: int, chunk: int,
               fitted_mask: npt.NDArray[np.bool_] | None = None,
               voxel_size_mm: npt.ArrayLike = (1.0, 1.0, 1.0),
               flat_index: npt.NDArray[np.integer] | None = None, threads: int = 1) -> VoxelFit:
    """Fit the voxels ``Y[:, columns]`` chunk by chunk.

    Parameters
    ----------
    Y : ndarray, shape (n_scans, n_voxels_in_mask), float32, or a one-element list holding it
        Unscaled signal. Given in a list, the array is taken out of the list and
        released as soon as it is no longer needed (after the first pass for
        OLS and AR(1)), so that smoothing and writing run without it in memory.
    columns : ndarray of int, shape (v,)
        Columns of ``Y`` to fit, in voxel order.
    factors : ndarray, shape (v,)
        Scale factors of those voxels (``estimation.compute_scale_factors``).
    design : DesignFactors
    settings : FitSettings
    order : int
        AR order (checked with ``estimation.check_ar_order``).
    chunk : int
        Voxels per chunk.
    fitted_mask : ndarray of bool, shape (nx, ny, nz), optional
        Grid positions of the fitted voxels; required when smoothing the AR
        estimates.
    voxel_size_mm : array_like, shape (3,)
    flat_index : ndarray of int, shape (v,), optional
        C-order flat grid index of each fitted voxel, in the order of
        ``columns``; by default the voxels of ``fitted_mask`` in C order.
    threads : int
        Chunks fitted side by side (see :func:`_for_each_chunk`); results do
        not depend on it.

    Returns
    -------
    VoxelFit
    """
    if isinstance(Y, list):
        Y = Y.pop()
    v = columns.size
    n, p = design.X.shape
    model = settings.autocorrelation
    max_lag = order if model == "arp" else 1
    starts = range(0, v, chunk)

    def block(s: int) -> tuple[slice, npt.NDArray[np.float64]]:
        sl = slice(s, min(s + chunk, v))
        cols = columns[sl]
        # nearly always the fitted columns of a chunk are contiguous: slice instead of gathering
        data = Y[:, cols[0]:cols[-1] + 1] if cols[-1] - cols[0] + 1 == cols.size else Y[:, cols]
        return sl, np.multiply(data, factors[sl], dtype=np.float64)

    beta = np.empty((p, v), dtype=np.float32)
    resvar = np.empty(v, dtype=np.float32)
    if model == "ar1":
        # AR(1): keep the OLS sufficient statistics, so the refit needs no second pass over the data
        lag_design_products = np.empty((p, v), dtype=np.float32)
        ends = np.empty((4, v))                          # e_first, e_last, e0, e1
        y_censored = np.empty((design.spike_rows.size, v))
    else:
        lag = np.empty((max_lag + 1, v))

    def first_pass(s: int) -> slice:
        sl, Yc = block(s)
        ols = est.fit_ols(design, Yc)
        if model == "ar1":
            summ = est.summarise_residuals(design, ols.residuals)
            beta[:, sl] = ols.beta
            lag_design_products[:, sl] = summ.lag_design_products
            ends[:, sl] = (summ.e_first, summ.e_last, summ.e0, summ.e1)
            y_censored[:, sl] = Yc[design.spike_rows]
        else:
            lag[:, sl] = est.compute_lag_products(ols.residuals, max_lag)
        if model == "ols":
            beta[:, sl] = ols.beta
            resvar[sl] = ols.residual_variance
        return sl

    _for_each_chunk(first_pass, starts, threads, "fit pass 1 (OLS)", v)
    if model == "ar1":
        lag = np.stack([ends[2], 2.0 * ends[3]])
    if model != "arp":
        Y = None  # not needed any more: let the caller's data go
    if model == "arp":
        acf = est.correct_autocorrelation(lag, est.compute_bias_matrix(design.X, max_lag))
    else:
        acf = est.correct_ar1(lag, est.compute_ar1_correction(design.X))[None, :]
    lag1 = np.clip(acf[0], -est.MAX_ABS_RHO, est.MAX_ABS_RHO)
    if model == "ols":
        cov = (design.pinv @ design.pinv.T)[None]
        return VoxelFit(beta=beta, residual_variance=resvar, ar_coef=np.zeros((v, 1), dtype=np.float32),
                        lag1=lag1.astype(np.float32), bin=np.zeros(v, dtype=np.int32), bin_rho=np.zeros(1),
                        bin_covariance=cov, order=0)
    if settings.ar_smoothing_fwhm_mm > 0:
        if fitted_mask is None:
            raise ValueError("fitted_mask is required to smooth the AR estimates")
        flat = np.flatnonzero(fitted_mask) if flat_index is None else np.asarray(flat_index)
        for k in range(acf.shape[0]):
            grid = np.zeros(fitted_mask.shape)
            grid.flat[flat] = acf[k]
            acf[k] = est.smooth_within_mask(grid, fitted_mask, settings.ar_smoothing_fwhm_mm, voxel_size_mm).flat[flat]
    bin_index, bin_rho = est.assign_bins(acf[0], settings.ar_bin_width)
    if model == "ar1":
        bins = est.prepare_bins(design, bin_rho)
        ar_coef = np.clip(acf[0], -est.MAX_ABS_RHO, est.MAX_ABS_RHO)[:, None]
    else:
        phi, _, _ = est.levinson_durbin(acf)
        ar_coef = phi.T
        counts = np.bincount(bin_index, minlength=bin_rho.size)
        bin_acf = np.empty((bin_rho.size, order))
        for k in range(order):
            bin_acf[:, k] = np.bincount(bin_index, weights=acf[k], minlength=bin_rho.size) / np.maximum(counts, 1)
        bin_acf[:, 0] = bin_rho
        bins = est.prepare_bins(design, bin_rho, bin_acf)

    def second_pass(s: int) -> slice:
        if model == "ar1":
            sl = slice(s, min(s + chunk, v))
            summ = est.Ar1Summary(lag_design_products=lag_design_products[:, sl], e_first=ends[0, sl],
                                  e_last=ends[1, sl], e0=ends[2, sl], e1=ends[3, sl])
            w = est.fit_ar1_summary(design, beta[:, sl], summ, y_censored[:, sl], bin_index[sl], bins)
        else:
            sl, Yc = block(s)
            w = est.fit_arp_block(design, Yc, bin_index[sl], bins)
        beta[:, sl] = w.beta
        resvar[sl] = w.residual_variance
        return sl

    _for_each_chunk(second_pass, starts, threads, f"fit pass 2 ({model} refit, {bin_rho.size} bins)", v)
    return VoxelFit(beta=beta, residual_variance=resvar, ar_coef=ar_coef.astype(np.float32),
                    lag1=lag1.astype(np.float32), bin=bin_index, bin_rho=bin_rho, bin_covariance=bins.covariance,
                    order=order)


# ---------------------------------------------------------------------------
# provenance with a hash computed while streaming
# ---------------------------------------------------------------------------

def build_record_precomputed(params: Mapping[str, Any], inputs: Mapping[str, str], precomputed: Mapping[str, str],
                             warnings_seen: list[str], **extra: Any) -> dict[str, Any]:
    """``provenance.build_record`` for this step, with some inputs' sha256 already known.

    Parameters
    ----------
    params, inputs, warnings_seen, **extra
        As for ``provenance.build_record``.
    precomputed : mapping of input name to sha256 hex
        Inputs whose bytes were hashed while reading them; they are not read again.

    Returns
    -------
    dict
        The same record ``build_record`` would make.
    """
    others = {k: v for k, v in inputs.items() if k not in precomputed}
    record = provenance.build_record(STEP, params, others, warnings_seen, **extra)
    described = dict(record["inputs"])
    for name, sha in precomputed.items():
        path = inputs[name]
        producer = provenance.read_record(path)
        described[name] = {
            "path": provenance.display_path(path),
            "sha256": sha,
            "step": producer.get("step") if producer else None,
            "params_hash": producer.get("params_hash") if producer else None,
            "lineage_hash": producer["lineage_hash"] if producer else sha,
        }
    record["inputs"] = {k: described[k] for k in inputs}
    record["lineage_hash"] = provenance.lineage_hash(STEP, record["params_hash"], record["inputs"])
    return record


def _map_block(wildcards: Mapping[str, str], stat: str) -> dict[str, Any]:
    w = dict(wildcards)
    subject = str(w.get("subject", ""))
    if "run_id" in w:
        key = parse_run_id(subject, str(w["run_id"]))
        session, task, run = key.session, key.task, key.run
    else:
        session, task, run = str(w.get("session", "")), str(w.get("task", "")), str(w.get("run", ""))
    return {"level": "run", "subject": subject, "session": session or None, "task": task, "run": run,
            "contrast": None, "stat": stat}


# ---------------------------------------------------------------------------
# the job
# ---------------------------------------------------------------------------

def run(inputs: Mapping[str, str | list[str]], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Fit one run (see the module docstring for the interface)."""
    t_start = time.perf_counter()
    settings = check_params(params)
    for key in ("bold", "mask", "design", "design_summary"):
        if key not in inputs:
            raise ConfigError(f"rule fit: input {key!r} is missing; name the inputs bold, mask, design, design_summary")
    for key in ("fit", "mean", "residual_sd", "ar_coef"):
        if key not in outputs:
            raise ConfigError(f"rule fit: output {key!r} is missing; name the outputs fit, mean, residual_sd, ar_coef")
    bold_path, mask_path = str(inputs["bold"]), str(inputs["mask"])
    in_paths = {k: str(inputs[k]) for k in ("bold", "mask", "design", "design_summary")}
    extra: dict[str, Any] = {}
    with provenance.collect_warnings() as seen:
        # --- every check before anything is written -------------------------------------------
        design_in = read_design(in_paths["design"], in_paths["design_summary"])
        bold = read_bold_header(bold_path)
        mask, mask_affine = read_mask(mask_path)
        check_grid(mask_path, mask.shape, mask_affine, bold)
        shape3 = tuple(int(s) for s in bold.shape[:3])
        if design_in.excluded:
            fit, extra = _excluded_fit(design_in, bold, settings)
        else:
            if bold.shape[3] != design_in.n_volumes:
                raise DataError(f"{bold_path}: {bold.shape[3]} volumes but the design summary "
                                f"{in_paths['design_summary']} says {design_in.n_volumes}; "
                                "check that the events, confounds and BOLD belong to the same run")
            check_repetition_time(bold, settings.repetition_time_s)
            try:
                design = est.prepare_design(design_in.X, design_in.roles)
            except DesignError as exc:
                raise DesignError(f"{in_paths['design']}: {exc}") from exc
            order = 1
            if settings.autocorrelation == "arp":
                order = est.check_ar_order(design, settings.ar_order)
                if order < settings.ar_order:
                    warnings.warn(f"{in_paths['design']}: AR({settings.ar_order}) does not fit a design with "
                                  f"{design.dof} residual degrees of freedom; using AR({order})",
                                  GlmstepsWarning, stacklevel=2)
            # --- read -----------------------------------------------------------------------------
            t_read = time.perf_counter()
            # passed on without a name here, so that fit_voxels can release the data after its first pass
            fit, extra = _fit_run(stream_masked(bold, mask, design_in.first_volume, threads=threads,
                                                voxel_order="disk"), mask, bold,
                                  design_in, design, settings, order, bold_path, time.perf_counter() - t_read,
                                  threads)
    t_fit_end = time.perf_counter()
    lag1 = extra.pop("_qc_lag1", None)
    sha = extra.pop("sha256_bold", None)
    timing = dict(extra.pop("timing_s", {}))
    if "timing_s_fit" in extra:
        timing["fit"] = extra.pop("timing_s_fit")
    timing["total_before_write"] = round(t_fit_end - t_start, 3)
    record = build_record_precomputed(params, in_paths, {"bold": sha} if sha else {}, list(seen), **extra)
    fit.attrs.update({"autocorrelation": settings.autocorrelation, "scaling": settings.scaling,
                      "repetition_time_s": settings.repetition_time_s})
    # --- write: sidecar first, then the fit, then the QC maps ----------------------------------------
    provenance.write_sidecar(outputs["fit"], record, timing_s=timing)
    write_fit(outputs["fit"], fit, record)
    qc = _qc_values(fit, lag1)
    for name in ("mean", "residual_sd", "ar_coef"):
        values, index = qc[name]
        provenance.write_sidecar(outputs[name], record, map=_map_block(wildcards, name))
        save_map(outputs[name], values, index, shape3, bold.affine)
    logger.info("fit written to %s in %.2f s", outputs["fit"], time.perf_counter() - t_start)


def _fit_run(series: Any, mask: npt.NDArray[np.bool_], bold: Any, design_in: DesignInput,
             design: est.DesignFactors, settings: FitSettings, order: int,
             bold_path: str, read_s: float, threads: int = 1) -> tuple[StoredFit, dict[str, Any]]:
    logger.info("read %s: %d volumes x %d in-mask voxels in %.2f s", bold_path, series.Y.shape[0],
                series.Y.shape[1], read_s)
    flat_c = series.flat_index  # grid index of each column (columns in the order the file stores them)
    mean = series.mean
    finite = np.isfinite(series.minimum) & np.isfinite(series.maximum) & np.isfinite(mean)
    non_finite = ~finite
    zero_var = finite & (series.minimum == series.maximum)
    nonpos = finite & ~zero_var & (mean <= 0) if settings.scaling == "percent" else np.zeros_like(finite)
    data = [series.Y]
    sha256 = series.sha256
    del series  # from here on only ``data`` holds the signal, so fit_voxels can release it
    fitted = finite & ~zero_var & ~nonpos
    counts = {"outside_mask": int(mask.size - flat_c.size), "non_finite": int(non_finite.sum()),
              "zero_variance": int(zero_var.sum()), "nonpositive_mean": int(nonpos.sum()),
              "fitted": int(fitted.sum())}
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
    fitted_mask = np.zeros(mask.shape, dtype=bool)
    fitted_mask.flat[voxel_index] = True
    t0 = time.perf_counter()
    vf = fit_voxels(data, columns, factors, design, settings, order, chunk_voxels(threads), fitted_mask,
                    bold.voxel_size_mm, flat_index=voxel_index, threads=threads)
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
    extra = {"excluded": False, "voxel_counts": counts, "autocorrelation": settings.autocorrelation,
             "ar_order": int(vf.order), "dof": int(design.dof), "rank": int(design.rank),
             "n_bins": int(vf.bin_rho.size), "n_volumes_fitted": int(design.X.shape[0]),
             "n_censored": int(design.censored.sum()),
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
