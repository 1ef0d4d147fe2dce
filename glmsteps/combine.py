"""Fixed-effects combination of a subject's runs (pure maths, arrays in).

A run whose contrast was skipped or excluded is left out by the caller; a NaN
(or non-positive variance) at a voxel of a run means that run is missing at
that voxel only.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from . import stats
from .errors import DataError


@dataclass
class FixedEffectsResult:
    """Per-voxel fixed-effects results (arrays of shape (v,), float64).

    ``n_runs`` counts the runs present at each voxel; where it is 0 every
    other array is NaN.
    """

    effect: npt.NDArray[np.float64]
    variance: npt.NDArray[np.float64]
    dof: npt.NDArray[np.float64]
    t: npt.NDArray[np.float64]
    z: npt.NDArray[np.float64]
    p: npt.NDArray[np.float64]
    n_runs: npt.NDArray[np.int64]


def check_same_grid(shapes: Sequence[tuple[int, ...]], affines: Sequence[npt.NDArray[np.floating]],
                    labels: Sequence[str], atol_mm: float = 1e-3) -> None:
    """Raise DataError unless all maps share one voxel grid.

    Parameters
    ----------
    shapes : sequence of tuple
        Map shapes (voxels).
    affines : sequence of ndarray, shape (4, 4)
        Voxel-to-world transforms (mm).
    labels : sequence of str
        Names of the maps (files or runs) for the message.
    atol_mm : float
        Tolerance on affine entries (mm).
    """
    for shape, affine, label in zip(shapes[1:], affines[1:], labels[1:]):
        if tuple(shape) != tuple(shapes[0]) or not np.allclose(affine, affines[0], atol=atol_mm):
            raise DataError(f"{label}: voxel grid (shape {tuple(shape)}) differs from {labels[0]} "
                            f"(shape {tuple(shapes[0])}) or its affine does; resample the runs to one grid")


def fixed_effects(effects: npt.NDArray[np.floating], variances: npt.NDArray[np.floating],
                  dofs: npt.ArrayLike, tail: stats.Tail = "two-sided") -> FixedEffectsResult:
    """Inverse-variance weighted combination of run contrasts.

    Parameters
    ----------
    effects : ndarray, shape (n_runs, n_voxels)
        Contrast effect c'b of each run; NaN where the run is missing.
    variances : ndarray, shape (n_runs, n_voxels)
        Its variance; NaN or <= 0 where the run is missing.
    dofs : array_like, shape (n_runs,) or (n_runs, n_voxels)
        Residual degrees of freedom of each run.
    tail : {"two-sided", "positive", "negative"}

    Returns
    -------
    FixedEffectsResult

    Notes
    -----
    With :math:`w_r = 1/v_r` over the runs present at a voxel,

    .. math::

        \\hat e = \\frac{\\sum_r w_r e_r}{\\sum_r w_r}, \\quad
        \\operatorname{var}(\\hat e) = \\frac{1}{\\sum_r w_r}, \\quad
        \\nu = \\sum_r \\nu_r, \\quad t = \\hat e / \\sqrt{\\operatorname{var}}

    (Cochran 1954; Hedges & Olkin 1985, ch. 6; Friston et al. 2005 for runs
    of one subject).
    """
    e = np.atleast_2d(np.asarray(effects, dtype=np.float64))
    v = np.atleast_2d(np.asarray(variances, dtype=np.float64))
    if e.shape != v.shape:
        raise ValueError(f"effects {e.shape} and variances {v.shape} differ in shape")
    d = np.asarray(dofs, dtype=np.float64)
    d = np.broadcast_to(d[:, None] if d.ndim == 1 else d, e.shape)
    present = np.isfinite(e) & np.isfinite(v) & (v > 0) & np.isfinite(d) & (d > 0)
    w = np.where(present, 1.0 / np.where(present, v, 1.0), 0.0)
    sum_w = w.sum(axis=0)
    n_runs = present.sum(axis=0)
    any_run = n_runs > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        effect = np.where(any_run, (w * np.where(present, e, 0.0)).sum(axis=0) / sum_w, np.nan)
        variance = np.where(any_run, 1.0 / sum_w, np.nan)
        t = effect / np.sqrt(variance)
    dof = np.where(any_run, np.where(present, d, 0.0).sum(axis=0), np.nan)
    log_p = stats.t_logpvalue(t, dof, tail)
    return FixedEffectsResult(effect=effect, variance=variance, dof=dof, t=t, z=stats.t_to_z(t, dof),
                              p=np.exp(log_p), n_runs=n_runs.astype(np.int64))


@dataclass
class RunContrastMoments:
    """One run's contrast estimate and its covariance at each fitted voxel.

    Attributes
    ----------
    effect : ndarray, shape (q, v), float64
        :math:`C\\hat\\beta` at each voxel.
    precision : ndarray, shape (v, q, q), float64
        Pseudo-inverse of :math:`\\operatorname{cov}(C\\hat\\beta) =
        \\hat\\sigma^2 C (X_w'X_w)^+ C'`; NaN where the voxel has no usable
        variance.
    rank : ndarray, shape (v,), float64
        Rank of that covariance (the F numerator degrees of freedom of the run).
    """

    effect: npt.NDArray[np.float64]
    precision: npt.NDArray[np.float64]
    rank: npt.NDArray[np.float64]


def run_contrast_moments(C: npt.ArrayLike, beta: npt.NDArray[np.floating],
                         residual_variance: npt.NDArray[np.floating], bin: npt.NDArray[np.integer],
                         bin_covariance: npt.NDArray[np.floating]) -> RunContrastMoments:
    """Contrast estimates and their precision matrices from one stored fit.

    Parameters
    ----------
    C : array_like, shape (q, n_regressors)
        Contrast matrix (one row per tested combination).
    beta : ndarray, shape (n_regressors, v)
    residual_variance : ndarray, shape (v,)
        :math:`\\hat\\sigma^2` of the (whitened) residuals.
    bin : ndarray of int, shape (v,)
        Each voxel's noise bin.
    bin_covariance : ndarray, shape (n_bins, n_regressors, n_regressors)
        :math:`(X_w'X_w)^+` of each bin.

    Returns
    -------
    RunContrastMoments

    Notes
    -----
    :math:`\\operatorname{cov}(C\\hat\\beta) = \\hat\\sigma^2\\, C (X_w'X_w)^+ C'`
    (Searle 1971, sec. 5.5), so its pseudo-inverse is the bin's
    :math:`[C (X_w'X_w)^+ C']^+` divided by :math:`\\hat\\sigma^2`. The loop runs
    over noise bins, never over voxels.
    """
    C = np.atleast_2d(np.asarray(C, dtype=np.float64))
    beta = np.asarray(beta, dtype=np.float64)
    sigma2 = np.asarray(residual_variance, dtype=np.float64)
    bins = np.asarray(bin, dtype=np.int64)
    cov = np.asarray(bin_covariance, dtype=np.float64)
    q, v = C.shape[0], beta.shape[1]
    per_bin = np.einsum("ij,bjk,lk->bil", C, cov, C) if cov.size else np.zeros((0, q, q))
    bin_pinv = np.stack([np.linalg.pinv(M, hermitian=True) for M in per_bin]) if per_bin.size else per_bin
    bin_rank = np.array([np.linalg.matrix_rank(M, hermitian=True) for M in per_bin], dtype=np.float64)
    ok = np.isfinite(sigma2) & (sigma2 > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(ok, 1.0 / np.where(ok, sigma2, 1.0), np.nan)
    precision = bin_pinv[bins] * scale[:, None, None] if v else np.zeros((0, q, q))
    rank = np.where(ok, bin_rank[bins], np.nan) if v else np.zeros(0)
    return RunContrastMoments(effect=C @ beta, precision=precision, rank=rank)


@dataclass
class FixedEffectsFResult:
    """Per-voxel fixed-effects F results (arrays of shape (v,), float64).

    ``n_runs`` counts the runs present at each voxel; where it is 0 every
    other array is NaN.
    """

    f: npt.NDArray[np.float64]
    dof1: npt.NDArray[np.float64]
    dof2: npt.NDArray[np.float64]
    z: npt.NDArray[np.float64]
    p: npt.NDArray[np.float64]
    n_runs: npt.NDArray[np.int64]


def fixed_effects_f(effects: Sequence[npt.NDArray[np.floating]], precisions: Sequence[npt.NDArray[np.floating]],
                    dofs: Sequence[npt.ArrayLike]) -> FixedEffectsFResult:
    """Fixed-effects F test of a multi-row contrast over runs.

    Parameters
    ----------
    effects : sequence (n_runs) of ndarray, shape (q, v)
        Each run's contrast estimate :math:`C\\hat\\beta_r`; NaN where the run is
        missing at a voxel.
    precisions : sequence (n_runs) of ndarray, shape (v, q, q)
        Each run's :math:`\\operatorname{cov}(C\\hat\\beta_r)^+`
        (:func:`run_contrast_moments`); NaN where the run is missing.
    dofs : sequence (n_runs) of float or ndarray (v,)
        Each run's residual degrees of freedom.

    Returns
    -------
    FixedEffectsFResult

    Notes
    -----
    The runs estimate one common :math:`\\theta = C\\beta` with independent
    errors, so with :math:`P_r = \\operatorname{cov}(C\\hat\\beta_r)^+` the
    generalised least-squares combination is

    .. math::

        \\hat\\theta = \\Big(\\sum_r P_r\\Big)^+ \\sum_r P_r C\\hat\\beta_r, \\qquad
        F = \\frac{\\hat\\theta' \\big(\\sum_r P_r\\big) \\hat\\theta}{q}, \\qquad
        q = \\operatorname{rank}\\Big(\\sum_r P_r\\Big)

    on :math:`(q, \\sum_r \\nu_r)` degrees of freedom: the Wald test of
    :math:`\\theta = 0` in the stacked model (Searle 1971, sec. 5.5; the
    multivariate form of Cochran's 1954 inverse-variance combination). With one
    row, :math:`F = t^2` of :func:`fixed_effects`.
    """
    if not effects:
        raise ValueError("fixed_effects_f needs at least one run")
    q, v = np.asarray(effects[0]).shape
    info = np.zeros((v, q, q))
    score = np.zeros((v, q))
    dof2 = np.zeros(v)
    n_runs = np.zeros(v, dtype=np.int64)
    for effect, precision, dof in zip(effects, precisions, dofs):
        e = np.asarray(effect, dtype=np.float64).T                 # (v, q)
        P = np.asarray(precision, dtype=np.float64)
        d = np.broadcast_to(np.asarray(dof, dtype=np.float64), (v,))
        present = (np.isfinite(e).all(axis=1) & np.isfinite(P).all(axis=(1, 2)) & np.isfinite(d) & (d > 0))
        Pz = np.where(present[:, None, None], P, 0.0)
        info += Pz
        score += np.einsum("vij,vj->vi", Pz, np.where(present[:, None], e, 0.0))
        dof2 += np.where(present, d, 0.0)
        n_runs += present
    any_run = n_runs > 0
    f = np.full(v, np.nan)
    rank = np.full(v, np.nan)
    if any_run.any():
        sel = np.flatnonzero(any_run)
        info_sel = info[sel]
        info_pinv = np.linalg.pinv(info_sel, hermitian=True)
        theta = np.einsum("vij,vj->vi", info_pinv, score[sel])
        quad = np.einsum("vi,vi->v", theta, score[sel])            # theta' info theta = score' info^+ score
        rank_sel = np.linalg.matrix_rank(info_sel, hermitian=True).astype(np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            f[sel] = np.where(rank_sel > 0, quad / rank_sel, np.nan)
        rank[sel] = np.where(rank_sel > 0, rank_sel, np.nan)
    dof2 = np.where(any_run, dof2, np.nan)
    log_p = stats.f_logpvalue(f, rank, dof2)
    return FixedEffectsFResult(f=f, dof1=rank, dof2=dof2, z=stats.f_to_z(f, rank, dof2), p=np.exp(log_p),
                               n_runs=n_runs)
