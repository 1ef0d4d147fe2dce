"""The chunked voxel fit of a run: OLS, autocorrelation model, prewhitened refit.

Arrays and callables in, arrays out; no file access (the fit step,
``glmsteps.jobs.fit``, reads the run, calls :func:`fit_voxels` and writes the
result). The voxels are fitted in chunks, possibly side by side in a pool of
threads (:func:`run_chunks`); every per-voxel result is bit-identical for any
chunk size and any number of threads (``tests/test_fitting.py``): the maths
functions of :mod:`glmsteps.estimation` make each voxel's arithmetic
independent of the other voxels of its chunk, and everything computed over
all voxels at once (the autocorrelation references, the smoothing, the bins)
runs after the first pass on whole arrays.

Autocorrelation models (``NoiseSettings.autocorrelation``):

``ols``
    no autocorrelation model.
``ar1``
    AR(1): the lag-1 autocorrelation of each voxel (:func:`estimate_noise`),
    smoothed, rounded to bins; each bin is refitted with the exact AR(1)
    whitening from the first pass's sufficient statistics (no second pass
    over the data).
``arp``
    AR(p): autocorrelations at lags 1..p estimated the same way and smoothed;
    voxels are binned on the smoothed lag-1 value, each bin's model is the
    mean of its voxels' smoothed autocorrelations (Yule-Walker AR(p)
    coefficients), and the data are refitted bin by bin by exact AR(p)
    GLS (a second pass over the data, which stays in memory: one product per
    voxel with the bin's GLS operator, the residual sum of squares from the
    first pass's lag products; ``estimation.fit_arp_summary``).

With tissue classes, the reference groups of the estimate, the smoothing and
the bins never mix voxels of different classes.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from . import estimation as est

logger = logging.getLogger("glmsteps")

#: Side (mm) of the cubes that key the reference groups of the autocorrelation estimate (:func:`estimate_noise`).
REFERENCE_BLOCK_MM = 12.0


@dataclass(frozen=True)
class NoiseSettings:
    """How the noise is modelled.

    Attributes
    ----------
    autocorrelation : {"ols", "ar1", "arp"}
        The autocorrelation model (``fit.autocorrelation``).
    order : int
        AR order (1 for ``ar1``; the order that fits the design, see
        ``estimation.check_ar_order``, for ``arp``).
    smoothing_fwhm_mm : float
        FWHM (mm) of the smoothing of the autocorrelation estimates (0: none).
    bin_width : float
        Width of the lag-1 bins.
    """

    autocorrelation: est.AutocorrelationModel
    order: int
    smoothing_fwhm_mm: float
    bin_width: float


@dataclass(frozen=True)
class VoxelGrid:
    """Where the fitted voxels are.

    Attributes
    ----------
    shape : tuple of 3 int
        The voxel grid.
    flat_index : ndarray of int, shape (v,)
        C-order flat grid index of each fitted voxel, in fitting order.
    voxel_size_mm : ndarray, shape (3,)
    classes : ndarray of int, shape (v,), optional
        Tissue class of each fitted voxel (``None``: one class).
    """

    shape: tuple[int, int, int]
    flat_index: npt.NDArray[np.int64]
    voxel_size_mm: npt.NDArray[np.float64]
    classes: npt.NDArray[np.int64] | None = None


@dataclass(frozen=True)
class VoxelFit:
    """Per-voxel results of :func:`fit_voxels` (v fitted voxels).

    Attributes
    ----------
    beta : ndarray, shape (p, v), float32
        Estimates (computed in float64, stored in float32).
    residual_variance : ndarray, shape (v,), float32
    ar_coef : ndarray, shape (v, order), float32
        AR coefficients of each voxel's bin model (zeros for OLS).
    lag1 : ndarray, shape (v,), float32
        Corrected lag-1 autocorrelation before smoothing (QC map).
    bin : ndarray of int32, shape (v,)
    bin_rho : ndarray, shape (b,)
        Lag-1 autocorrelation of each bin's model.
    bin_covariance : ndarray, shape (b, p, p)
    order : int
        AR order (0 for OLS).
    """

    beta: npt.NDArray[np.float32]
    residual_variance: npt.NDArray[np.float32]
    ar_coef: npt.NDArray[np.float32]
    lag1: npt.NDArray[np.float32]
    bin: npt.NDArray[np.int32]
    bin_rho: npt.NDArray[np.float64]
    bin_covariance: npt.NDArray[np.float64]
    order: int


def _log_progress(label: str, done: int, total: int, start: float) -> None:
    elapsed = time.perf_counter() - start
    left = elapsed / done * (total - done) if done else float("nan")
    logger.info("%s: %d/%d voxels, %.1f s elapsed, about %.1f s left", label, done, total, elapsed, left)


def run_chunks(work: Callable[[int], slice], starts: range, threads: int, label: str, total: int) -> None:
    """Call ``work(start)`` for every chunk start, logging progress.

    Parameters
    ----------
    work : callable
        Fits one chunk; returns the slice of voxels it wrote.
    starts : range
        First voxel of each chunk.
    threads : int
        With more than 1, the chunks run in a pool of that many threads.
    label : str
        Progress label for the log.
    total : int
        Number of voxels.

    Notes
    -----
    Each chunk writes its own columns of preallocated arrays, and numpy
    releases the GIL in its matrix products and element-wise loops, so chunks
    overlap. Each chunk's arithmetic is the same whatever the pool, so the
    results are too. Progress is logged in chunk order.

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


def block_means(values: npt.NDArray[np.float64], grid: VoxelGrid, block_mm: float) -> npt.NDArray[np.float64]:
    """Mean of ``values`` (shape (v,)) over the voxels of the same class in the same cube of about ``block_mm``.

    The cubes tile the grid (``max(1, round(block_mm / voxel size))`` voxels a side); the mean of a
    voxel's cube and class, shape (v,). Sums by ``bincount`` over all voxels, so chunk independent.
    """
    side = np.maximum(np.round(block_mm / np.asarray(grid.voxel_size_mm, dtype=np.float64)), 1).astype(np.int64)
    ijk = np.unravel_index(np.asarray(grid.flat_index, dtype=np.int64), grid.shape)
    cells = [int(-(-n // s)) for n, s in zip(grid.shape, side)]
    key = np.ravel_multi_index(tuple(i // s for i, s in zip(ijk, side)), cells)
    if grid.classes is not None:
        key = key + np.asarray(grid.classes, dtype=np.int64) * int(np.prod(cells))
    _, block = np.unique(key, return_inverse=True)
    block = block.reshape(-1)
    return (np.bincount(block, weights=values) / np.bincount(block))[block]


def estimate_noise(lag_products: npt.NDArray[np.float64], design: est.DesignFactors,
                   grid: VoxelGrid) -> est.AutocorrelationEstimate:
    """Each voxel's autocorrelations at lags 1..p from its residual lag products (before smoothing).

    Parameters
    ----------
    lag_products : ndarray, shape (p + 1, v)
        ``estimation.compute_lag_products`` of the voxels' OLS residuals, in the order of ``grid``.
    design : DesignFactors
    grid : VoxelGrid

    Returns
    -------
    AutocorrelationEstimate

    Notes
    -----
    :func:`glmsteps.estimation.estimate_autocorrelation`, with reference groups keyed by the
    first-pass (truncated) lag-1 estimate averaged over cubes of ``REFERENCE_BLOCK_MM`` within the
    tissue classes (:func:`block_means`), so that a voxel's own noise hardly moves its group (a
    cube of 12 mm holds 64 voxels of 3 mm).
    """
    moments = est.compute_lag_moments(design, lag_products.shape[0] - 1)
    key = block_means(est.truncated_autocorrelation(lag_products, moments, 1)[0], grid, REFERENCE_BLOCK_MM)
    return est.estimate_autocorrelation(lag_products, design, moments, grid.classes, key)


def _bin_models(design: est.DesignFactors, acf: npt.NDArray[np.float64], noise: NoiseSettings,
                grid: VoxelGrid) -> tuple[npt.NDArray[np.int32], est.NoiseBins]:
    """Smoothing (within classes), bins on the smoothed lag 1 and each bin's whitening.

    Every lag is smoothed before binning. (Smoothing lag 1 only and averaging the unsmoothed higher
    lags over each bin is not the same: the bins select voxels by their own lag-1 noise, which the
    unsmoothed higher lags share, and the bin models' AR coefficients come out biased by several
    Monte-Carlo SE; ``tests/test_calibration.py`` catches it.)
    """
    smoothed = est.smooth_voxel_values(acf, grid.flat_index, grid.shape, noise.smoothing_fwhm_mm,
                                       grid.voxel_size_mm, grid.classes, out=acf)       # in place
    bin_index, centres = est.assign_bins(smoothed[0], noise.bin_width, grid.classes)
    np.clip(smoothed, -est.MAX_ABS_RHO, est.MAX_ABS_RHO, out=smoothed)
    means = est.bin_means(smoothed, bin_index, centres.size)
    if noise.autocorrelation == "ar1":
        return bin_index, est.prepare_bins(design, means[:, 0])
    return bin_index, est.prepare_bins(design, means[:, 0], means)


def fit_voxels(Y: npt.NDArray[np.floating] | list[npt.NDArray[np.floating]], columns: npt.NDArray[np.integer],
               factors: npt.NDArray[np.floating], design: est.DesignFactors, noise: NoiseSettings, chunk: int,
               grid: VoxelGrid, threads: int = 1) -> VoxelFit:
    """Fit the voxels ``Y[:, columns]`` chunk by chunk.

    Parameters
    ----------
    Y : ndarray, shape (n_scans, n_voxels_in_mask), float32, or a one-element list holding it
        Unscaled signal. Given in a list, the array is taken out of the list and
        released as soon as it is no longer needed (after the first pass for
        OLS and AR(1)), so that the autocorrelation model and writing run without it in memory.
    columns : ndarray of int, shape (v,)
        Columns of ``Y`` to fit, in voxel order.
    factors : ndarray, shape (v,)
        Scale factors of those voxels (``estimation.compute_scale_factors``).
    design : DesignFactors
    noise : NoiseSettings
    chunk : int
        Voxels per chunk.
    grid : VoxelGrid
        Grid positions (and tissue classes) of the voxels, in the order of ``columns``.
    threads : int
        Chunks fitted side by side (see :func:`run_chunks`); results do not depend on it.

    Returns
    -------
    VoxelFit
    """
    if isinstance(Y, list):
        Y = Y.pop()
    v = columns.size
    n, p = design.X.shape
    model = noise.autocorrelation
    max_lag = noise.order if model == "arp" else 1
    starts = range(0, v, chunk)

    def block(s: int) -> tuple[slice, npt.NDArray[np.float64]]:
        sl = slice(s, min(s + chunk, v))
        cols = columns[sl]
        # nearly always the fitted columns of a chunk are contiguous: slice instead of gathering (np.take
        # keeps C order, which multiply_columns needs to stay on one BLAS kernel)
        data = Y[:, cols[0]:cols[-1] + 1] if cols[-1] - cols[0] + 1 == cols.size else np.take(Y, cols, axis=1)
        return sl, np.multiply(data, factors[sl], dtype=np.float64)

    lag = np.empty((max_lag + 1, v))
    if model in ("ols", "ar1"):
        beta64 = np.empty((p, v))                        # OLS estimates, float64 until the refit
    if model == "ols":
        resvar = np.empty(v, dtype=np.float32)
    if model == "ar1":
        # AR(1): keep the OLS sufficient statistics, so the refit needs no second pass over the data
        lag_design_products = np.empty((p, v))
        ends = np.empty((2, v))                          # e_first, e_last
        y_censored = np.empty((design.spike_rows.size, v))

    def first_pass(s: int) -> slice:
        sl, Yc = block(s)
        ols = est.fit_ols(design, Yc)
        lag[:, sl] = est.compute_lag_products(ols.residuals, max_lag)
        if model == "ar1":
            summ = est.summarise_residuals(design, ols.residuals)
            beta64[:, sl] = ols.beta
            lag_design_products[:, sl] = summ.lag_design_products
            ends[:, sl] = (summ.e_first, summ.e_last)
            y_censored[:, sl] = Yc[design.spike_rows]
        elif model == "ols":
            beta64[:, sl] = ols.beta
            resvar[sl] = ols.residual_variance
        return sl

    run_chunks(first_pass, starts, threads, "fit pass 1 (OLS)", v)
    if model != "arp":
        Y = None  # not needed any more: let the caller's data go
    estimate = estimate_noise(lag, design, grid)
    lag1 = np.clip(estimate.acf[0], -est.MAX_ABS_RHO, est.MAX_ABS_RHO).astype(np.float32)
    if model == "ols":
        cov = (design.pinv @ design.pinv.T)[None]
        return VoxelFit(beta=beta64.astype(np.float32), residual_variance=resvar,
                        ar_coef=np.zeros((v, 1), dtype=np.float32), lag1=lag1, bin=np.zeros(v, dtype=np.int32),
                        bin_rho=np.zeros(1), bin_covariance=cov, order=0)
    acf = estimate.acf
    del estimate
    bin_index, bins = _bin_models(design, acf, noise, grid)
    del acf
    beta = np.empty((p, v), dtype=np.float32)
    resvar = np.empty(v, dtype=np.float32)

    def second_pass(s: int) -> slice:
        if model == "ar1":
            sl = slice(s, min(s + chunk, v))
            summ = est.Ar1Summary(lag_design_products=lag_design_products[:, sl], e_first=ends[0, sl],
                                  e_last=ends[1, sl], e0=lag[0, sl], e1=0.5 * lag[1, sl])
            w = est.fit_ar1_summary(design, beta64[:, sl], summ, y_censored[:, sl], bin_index[sl], bins)
        else:
            # the chunk's voxels in bin order, gathered once (each bin is then a slice of columns)
            sl = slice(s, min(s + chunk, v))
            order = np.argsort(bin_index[sl], kind="stable")
            here = s + order
            Yc = np.multiply(np.take(Y, columns[here], axis=1), factors[here], dtype=np.float64)
            w = est.fit_arp_summary(design, Yc, lag[:, here], bin_index[here], bins)
            beta[:, here] = w.beta
            resvar[here] = w.residual_variance
            return sl
        beta[:, sl] = w.beta
        resvar[sl] = w.residual_variance
        return sl

    run_chunks(second_pass, starts, threads, f"fit pass 2 ({model} refit, {bins.rho.size} bins)", v)
    return VoxelFit(beta=beta, residual_variance=resvar, ar_coef=bins.phi[bin_index].astype(np.float32),
                    lag1=lag1, bin=bin_index, bin_rho=bins.rho, bin_covariance=bins.covariance,
                    order=int(bins.phi.shape[1]))
