"""AR bins, exact AR whitening and the prewhitened refit of voxel blocks.

Pure maths: arrays in, arrays out, no file access (see :mod:`glmsteps.estimation`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from .autocorrelation import MAX_ABS_RHO, autocorrelation_of_ar, levinson_durbin
from .ols import DesignFactors, FloatArray, OlsBlock, apply_group_matrices, multiply_columns


def assign_bins(rho: npt.ArrayLike, bin_width: float = 0.01,
                classes: npt.ArrayLike | None = None) -> tuple[npt.NDArray[np.int32], FloatArray]:
    """Round lag-1 autocorrelations to bins, within tissue classes.

    Parameters
    ----------
    rho : array_like, shape (n_voxels,)
    bin_width : float
        Bin width (autocorrelation units, default 0.01).
    classes : array_like of int, shape (n_voxels,), optional
        Tissue class of each voxel; voxels of different classes never share a
        bin.

    Returns
    -------
    bin_index : ndarray of int32, shape (n_voxels,)
        Index into ``bin_rho``.
    bin_rho : ndarray, shape (n_bins,), float64
        Bin centres ``k * bin_width`` within ``+-MAX_ABS_RHO``, sorted by class
        then centre.
    """
    rho = np.clip(np.asarray(rho, dtype=np.float64), -MAX_ABS_RHO, MAX_ABS_RHO)
    kmax = int(math.floor(MAX_ABS_RHO / bin_width + 1e-9))
    k = np.clip(np.round(rho / bin_width).astype(np.int64), -kmax, kmax)
    key = k if classes is None else np.asarray(classes, dtype=np.int64) * (2 * kmax + 1) + k
    keys, index = np.unique(key, return_inverse=True)
    centres = (keys if classes is None else (keys + kmax) % (2 * kmax + 1) - kmax) * bin_width
    return index.astype(np.int32).reshape(rho.shape), centres.astype(np.float64)


def bin_means(values: npt.NDArray[np.floating], bin_index: npt.NDArray[np.integer], n_bins: int) -> FloatArray:
    """Mean of each row of ``values`` (shape (k, n_voxels)) over each bin, shape (n_bins, k)."""
    values = np.atleast_2d(np.asarray(values, dtype=np.float64))
    counts = np.maximum(np.bincount(bin_index, minlength=n_bins), 1).astype(np.float64)
    return np.stack([np.bincount(bin_index, weights=row, minlength=n_bins) / counts for row in values], axis=1)


def whiten_ar(Z: npt.NDArray[np.floating], phi: npt.ArrayLike, innovation_variance: float,
              acf_head: npt.ArrayLike) -> FloatArray:
    """Apply the exact AR(q) whitening to the rows of ``Z``.

    Parameters
    ----------
    Z : ndarray, shape (n_scans, k)
        Columns to whiten (design columns or voxel series).
    phi : array_like, shape (q,)
        AR coefficients.
    innovation_variance : float
        ``var(u) / var(y)`` of the model.
    acf_head : array_like, shape (q,)
        Autocorrelations at lags 0..q-1 (``acf_head[0] = 1``).

    Returns
    -------
    ndarray, shape (n_scans, k), float64
        ``W Z`` with ``W V W' = innovation_variance * I``.

    Notes
    -----
    Rows ``t >= q``: ``u_t = z_t - sum_k phi_k z_{t-k}`` (the innovations).
    The first q rows: ``sqrt(innovation_variance) * L^{-1} z_{0:q}`` with ``L``
    the Cholesky factor of the q x q autocorrelation matrix, so the first
    scans are kept and carry the innovation variance. For q = 1 this is the
    Prais-Winsten transform, ``u_1 = sqrt(1 - rho^2) z_1`` (Prais & Winsten
    (1954), Cowles Commission discussion paper 383).
    """
    Z = np.asarray(Z, dtype=np.float64)
    phi = np.asarray(phi, dtype=np.float64)
    q = phi.size
    out = Z.copy()
    if q == 0:
        return out
    for k in range(1, q + 1):
        out[q:] -= phi[k - 1] * Z[q - k:Z.shape[0] - k]
    head = np.asarray(acf_head, dtype=np.float64)[:q]
    lags = np.abs(np.subtract.outer(np.arange(q), np.arange(q)))
    L = np.linalg.cholesky(head[lags])
    out[:q] = math.sqrt(innovation_variance) * np.linalg.solve(L, Z[:q])
    return out


def whitened_covariance(Xw: npt.NDArray[np.floating]) -> tuple[FloatArray, FloatArray]:
    """``pinv(Xw)`` and ``pinv(Xw' Xw)`` of a whitened design, from one SVD.

    Parameters
    ----------
    Xw : ndarray, shape (n_scans, n_regressors)

    Returns
    -------
    pinv : ndarray, shape (n_regressors, n_scans)
    covariance : ndarray, shape (n_regressors, n_regressors)
        ``V S^-2 V'`` over the non-negligible singular values.
    """
    U, s, Vt = np.linalg.svd(Xw, full_matrices=False)
    tol = s.max(initial=0.0) * max(Xw.shape) * np.finfo(np.float64).eps
    keep = s > tol
    Vk = Vt[keep].T
    return (Vk / s[keep]) @ U[:, keep].T, (Vk / s[keep] ** 2) @ Vk.T


@dataclass(frozen=True)
class NoiseBins:
    """The whitening of each bin.

    Attributes
    ----------
    rho : ndarray, shape (n_bins,)
        Lag-1 coefficient of each bin (the bin centre).
    phi : ndarray, shape (n_bins, order)
        AR coefficients used for whitening (``phi[:, 0] = rho`` for AR(1)).
    innovation_variance : ndarray, shape (n_bins,)
    acf : ndarray, shape (n_bins, order)
        Autocorrelations at lags 0..order-1 of each bin's model.
    order : ndarray of int, shape (n_bins,)
        AR order actually used by each bin (see :func:`levinson_durbin`).
    covariance : ndarray, shape (n_bins, n_regressors, n_regressors)
        ``pinv(Xw' Xw)`` of each bin's whitened design.
    pinv : ndarray, shape (n_bins, n_regressors, n_scans)
        ``pinv(Xw)``.
    whitened_design : ndarray, shape (n_bins, n_scans, n_regressors)
        ``Xw`` of each bin.
    """

    rho: FloatArray
    phi: FloatArray
    innovation_variance: FloatArray
    acf: FloatArray
    order: npt.NDArray[np.int64]
    covariance: FloatArray
    pinv: FloatArray
    whitened_design: FloatArray


def prepare_bins(design: DesignFactors, bin_rho: npt.ArrayLike,
                 bin_acf: npt.NDArray[np.floating] | None = None) -> NoiseBins:
    """Whitened-design factors of every bin.

    Parameters
    ----------
    design : DesignFactors
    bin_rho : array_like, shape (n_bins,)
        Lag-1 coefficient of each bin.
    bin_acf : ndarray, shape (n_bins, order), optional
        Autocorrelations at lags 1..order of each bin (AR(q) models; column 0
        should equal ``bin_rho``). ``None`` means AR(1).

    Returns
    -------
    NoiseBins
    """
    bin_rho = np.asarray(bin_rho, dtype=np.float64)
    if bin_acf is None:
        bin_acf = bin_rho[:, None]
    bin_acf = np.asarray(bin_acf, dtype=np.float64)
    order = bin_acf.shape[1]
    phi, err, used = levinson_durbin(bin_acf.T)
    phi = phi.T
    n, p = design.X.shape
    acf_head = np.zeros((bin_rho.size, order))
    covs = np.empty((bin_rho.size, p, p))
    pinvs = np.empty((bin_rho.size, p, n))
    designs = np.empty((bin_rho.size, n, p))
    for b in range(bin_rho.size):
        q = int(used[b])
        r = autocorrelation_of_ar(phi[b, :q], order)
        acf_head[b] = r
        designs[b] = whiten_ar(design.X, phi[b, :q], float(err[b]), r[:q])
        pinvs[b], covs[b] = whitened_covariance(designs[b])
    return NoiseBins(rho=bin_rho, phi=phi, innovation_variance=err, acf=acf_head, order=used, covariance=covs,
                     pinv=pinvs, whitened_design=designs)


@dataclass(frozen=True)
class WhitenedBlock:
    """Prewhitened fit of a block of voxels.

    Attributes
    ----------
    beta : ndarray, shape (n_regressors, n_voxels), float64
    residual_variance : ndarray, shape (n_voxels,)
        Whitened residual sum of squares / dof (innovation variance).
    """

    beta: FloatArray
    residual_variance: FloatArray


def _settle_spikes(design: DesignFactors, y_censored: FloatArray, beta: FloatArray) -> None:
    """Set indicator coefficients so that each censored volume's residual is zero (in place).

    ``y_censored`` is ``Y[design.spike_rows]``, shape (n_spikes, n_voxels).
    """
    if not design.spike_rows.size:
        return
    other = ~design.spike_columns
    rows = design.spike_rows
    beta[design.spike_columns] = y_censored - multiply_columns(design.X[np.ix_(rows, other)], beta[other])


@dataclass(frozen=True)
class Ar1Summary:
    """What the AR(1) refit needs from a block's OLS residuals.

    Attributes
    ----------
    lag_design_products : ndarray, shape (n_regressors, n_voxels)
        ``(D_1 X)' e``.
    e_first, e_last : ndarray, shape (n_voxels,)
        Residuals of the first and last scan.
    e0 : ndarray, shape (n_voxels,)
        ``sum_t e_t^2``.
    e1 : ndarray, shape (n_voxels,)
        ``sum_t e_t e_{t-1}``.
    """

    lag_design_products: FloatArray
    e_first: FloatArray
    e_last: FloatArray
    e0: FloatArray
    e1: FloatArray


def summarise_residuals(design: DesignFactors, residuals: npt.NDArray[np.floating]) -> Ar1Summary:
    """Per-voxel sufficient statistics of OLS residuals for the AR(1) refit.

    Parameters
    ----------
    design : DesignFactors
    residuals : ndarray, shape (n_scans, n_voxels)
        OLS residuals (zero at censored volumes).

    Returns
    -------
    Ar1Summary
    """
    e = np.asarray(residuals, dtype=np.float64)
    return Ar1Summary(lag_design_products=multiply_columns(design.lag_design.T, e), e_first=e[0].copy(),
                      e_last=e[-1].copy(), e0=np.einsum("tv,tv->v", e, e),
                      e1=np.einsum("tv,tv->v", e[1:], e[:-1]))


def fit_ar1_summary(design: DesignFactors, beta_ols: npt.NDArray[np.floating], summary: Ar1Summary,
                    y_censored: npt.NDArray[np.floating], bin_index: npt.NDArray[np.integer],
                    bins: NoiseBins) -> WhitenedBlock:
    """AR(1)-prewhitened refit of a block of voxels from its OLS sufficient statistics.

    Parameters
    ----------
    design : DesignFactors
    beta_ols : ndarray, shape (n_regressors, n_voxels)
        OLS estimates of the block.
    summary : Ar1Summary
        From :func:`summarise_residuals` on the block's OLS residuals.
    y_censored : ndarray, shape (n_spikes, n_voxels)
        Scaled signal at the censored volumes (``Y[design.spike_rows]``).
    bin_index : ndarray of int, shape (n_voxels,)
        Bin of each voxel.
    bins : NoiseBins
        From :func:`prepare_bins` without ``bin_acf``.

    Returns
    -------
    WhitenedBlock

    Notes
    -----
    With ``W`` the Prais-Winsten transform, ``Q = W'W = I + rho^2 J - rho D_1``
    (``J`` the identity without its first and last diagonal entries), and
    ``e`` the OLS residual (``X'e = 0``), the GLS estimate is
    ``beta = beta_ols + C X'Q e`` with ``C = pinv(X'QX)`` and
    ``X'Q e = -rho^2 (x_1 e_1 + x_n e_n) - rho (D_1 X)' e``; the whitened
    residual sum of squares is ``e'Qe - (X'Qe)' C (X'Qe)`` with
    ``e'Qe = (1 + rho^2) e'e - rho^2 (e_1^2 + e_n^2) - 2 rho sum_t e_t e_{t-1}``.
    So each voxel needs only ``(D_1 X)' e``, ``e'e``, the lag-1 product and its
    end residuals; the data are never gathered per bin. This is algebraically
    the refit of ``W y`` on ``W X`` (Prais & Winsten 1954; generalised least
    squares, e.g. Seber & Lee (2003) *Linear Regression Analysis*, sec. 3.10),
    checked against statsmodels GLS in ``tests/test_estimation.py``.
    """
    rho = bins.rho[bin_index]
    rho2 = rho * rho
    z = -rho2 * (np.outer(design.X[0], summary.e_first) + np.outer(design.X[-1], summary.e_last))
    z -= rho * np.asarray(summary.lag_design_products, dtype=np.float64)
    eqe = ((1.0 + rho2) * summary.e0 - rho2 * (summary.e_first ** 2 + summary.e_last ** 2)
           - 2.0 * rho * summary.e1)
    delta = apply_group_matrices(bins.covariance, bin_index, z)
    rss = eqe - np.einsum("pv,pv->v", z, delta)
    beta = np.asarray(beta_ols, dtype=np.float64) + delta
    _settle_spikes(design, np.asarray(y_censored, dtype=np.float64), beta)
    return WhitenedBlock(beta=beta, residual_variance=np.maximum(rss, 0.0) / design.dof)


def fit_ar1_block(design: DesignFactors, Y: npt.NDArray[np.floating], ols: OlsBlock,
                  bin_index: npt.NDArray[np.integer], bins: NoiseBins) -> WhitenedBlock:
    """AR(1)-prewhitened refit of a block of voxels from its OLS fit.

    Parameters
    ----------
    design : DesignFactors
    Y : ndarray, shape (n_scans, n_voxels)
        Scaled signal (used only at censored volumes).
    ols : OlsBlock
        OLS fit of the same block.
    bin_index : ndarray of int, shape (n_voxels,)
    bins : NoiseBins
        From :func:`prepare_bins` without ``bin_acf``.

    Returns
    -------
    WhitenedBlock

    Notes
    -----
    :func:`summarise_residuals` then :func:`fit_ar1_summary` (formulas there).
    """
    summary = summarise_residuals(design, ols.residuals)
    Y = np.asarray(Y)
    return fit_ar1_summary(design, ols.beta, summary, Y[design.spike_rows], bin_index, bins)


def fit_arp_block(design: DesignFactors, Y: npt.NDArray[np.floating], bin_index: npt.NDArray[np.integer],
                  bins: NoiseBins) -> WhitenedBlock:
    """AR(q)-prewhitened refit of a block of voxels, bin by bin.

    Parameters
    ----------
    design : DesignFactors
    Y : ndarray, shape (n_scans, n_voxels)
    bin_index : ndarray of int, shape (n_voxels,)
    bins : NoiseBins
        From :func:`prepare_bins` with ``bin_acf``.

    Returns
    -------
    WhitenedBlock

    Notes
    -----
    Per bin: ``beta = pinv(W X) W y``, ``sigma^2 = |W y - W X beta|^2 / dof``
    with ``W`` from :func:`whiten_ar` (generalised least squares).
    """
    Y = np.asarray(Y, dtype=np.float64)
    p, v = design.X.shape[1], Y.shape[1]
    beta = np.empty((p, v))
    rss = np.empty(v)
    for b in np.unique(bin_index):
        cols = np.flatnonzero(bin_index == b)
        q = int(bins.order[b])
        Yw = whiten_ar(Y[:, cols], bins.phi[b, :q], float(bins.innovation_variance[b]), bins.acf[b, :q])
        bb = multiply_columns(bins.pinv[b], Yw)
        res = Yw - multiply_columns(bins.whitened_design[b], bb)
        beta[:, cols] = bb
        rss[cols] = np.einsum("tv,tv->v", res, res)
    _settle_spikes(design, Y[design.spike_rows], beta)
    return WhitenedBlock(beta=beta, residual_variance=rss / design.dof)
