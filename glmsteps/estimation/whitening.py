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
        Lag-1 autocorrelation of each bin's model.
    phi : ndarray, shape (n_bins, order)
        AR coefficients used for whitening (zeros above the order a bin uses).
    innovation_variance : ndarray, shape (n_bins,)
    acf : ndarray, shape (n_bins, order)
        Autocorrelations at lags 0..order-1 of each bin's model.
    order : ndarray of int, shape (n_bins,)
        AR order actually used by each bin (see :func:`levinson_durbin`).
    covariance : ndarray, shape (n_bins, n_regressors, n_regressors)
        ``pinv(Xw' Xw)`` of each bin's whitened design ``Xw = W X``.
    band : ndarray, shape (n_bins, order + 1)
        ``g_d``, ``d = 0..order``: away from its corners ``Q = W' W`` is the
        banded Toeplitz matrix ``Q_ij = g_|i-j|``, ``g_d = sum_k psi_k psi_(k+d)``
        with ``psi = (1, -phi_1, ..., -phi_order)``.
    information : ndarray, shape (n_bins, n_regressors, n_regressors)
        ``Xw' Xw = X' Q X``.
    refit_operator : ndarray, shape (n_bins, n_regressors + 2 order, n_scans)
        Rows applied to a series ``y`` by :func:`fit_arp_summary`: ``G = pinv(Xw) W``
        (the GLS estimate ``G y``) and ``u_i' R`` on the first and on the last
        ``order`` scans, with ``u_i`` the eigenvectors of the two corners of
        ``Q - T(g)`` (AR(p) bins; empty for AR(1) bins, refitted from
        sufficient statistics).
    corner_weights : ndarray, shape (n_bins, 2 order)
        The eigenvalues of the two corners.
    """

    rho: FloatArray
    phi: FloatArray
    innovation_variance: FloatArray
    acf: FloatArray
    order: npt.NDArray[np.int64]
    covariance: FloatArray
    information: FloatArray
    band: FloatArray
    refit_operator: FloatArray
    corner_weights: FloatArray


def _band_and_corners(phi: FloatArray, innovation_variance: float,
                      acf_head: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
    """``g`` and the two corners of ``Q = W' W`` for the AR(P) whitening :func:`whiten_ar`.

    Rows ``t >= P`` of ``W`` hold ``psi`` at ``t - k``; the first P rows are the head. ``Q_ij`` for
    ``P <= i, j < n - P`` sums whole body rows (``g_|i-j|``); only the first P x P block (head rows
    instead of body rows) and the last P x P block (rows past the end missing) differ.
    """
    P = phi.size
    psi = np.r_[1.0, -phi]
    band = np.array([psi[:P + 1 - d] @ psi[d:] for d in range(P + 1)])
    T = band[np.abs(np.subtract.outer(np.arange(P), np.arange(P)))]
    top = whiten_ar(np.eye(3 * P), phi, innovation_variance, acf_head)[:2 * P, :P]   # rows 2P.. miss cols < P
    last = sum(psi[k] * np.eye(P, k=-k) for k in range(P))                        # rows n-P..n-1, cols n-P..n-1
    return band, top.T @ top - T, last.T @ last - T


def prepare_bins(design: DesignFactors, bin_rho: npt.ArrayLike,
                 bin_acf: npt.NDArray[np.floating] | None = None) -> NoiseBins:
    """Whitened-design factors of every bin.

    Parameters
    ----------
    design : DesignFactors
    bin_rho : array_like, shape (n_bins,)
        Lag-1 autocorrelation of each bin.
    bin_acf : ndarray, shape (n_bins, order), optional
        Autocorrelations at lags 1..order of each bin (AR(q) models; column 0
        should equal ``bin_rho``). ``None`` means AR(1), refitted from
        sufficient statistics (:func:`fit_ar1_summary`), so the operators of
        :func:`fit_arp_summary` are not built.

    Returns
    -------
    NoiseBins

    Notes
    -----
    A bin whose autocorrelations support only a lower order ``q`` (see
    :func:`levinson_durbin`) is whitened as the AR(order) model with
    ``phi_k = 0`` above ``q`` and the head of its own autocorrelations: that is
    still an exact whitening of the AR(q) correlation, and GLS does not depend
    on which exact whitening is used.
    """
    bin_rho = np.asarray(bin_rho, dtype=np.float64)
    operators = bin_acf is not None
    if bin_acf is None:
        bin_acf = bin_rho[:, None]
    bin_acf = np.asarray(bin_acf, dtype=np.float64)
    order = bin_acf.shape[1]
    phi, err, used = levinson_durbin(bin_acf.T)
    phi = phi.T
    n, p = design.X.shape
    nb = bin_rho.size
    acf_head = np.zeros((nb, order))
    covs = np.empty((nb, p, p))
    band = np.zeros((nb, order + 1))
    info = np.empty((nb, p, p))
    ops = np.empty((nb, p + 2 * order, n)) if operators else np.zeros((nb, 0, 0))
    weights = np.zeros((nb, 2 * order))
    if operators:
        R = -design.X @ design.pinv
        R[np.diag_indices(n)] += 1.0
        ends = [np.arange(order), np.arange(n - order, n)]
        R_ends = [R[rows].copy() for rows in ends]
        for rows, Rr in zip(ends, R_ends):
            Rr[design.censored[rows]] = 0.0          # exactly zero, as the OLS residuals of fit_ols
    for b in range(nb):
        r = autocorrelation_of_ar(phi[b, :int(used[b])], order)
        acf_head[b] = r
        Xw = whiten_ar(design.X, phi[b], float(err[b]), r)
        _, covs[b] = whitened_covariance(Xw)
        info[b] = Xw.T @ Xw
        band[b], head, tail = _band_and_corners(phi[b], float(err[b]), r)
        if operators:
            # G = pinv(Xw) W = C Xw' W = C (Q X)': Q X from the band and the corners, no n x n matrix
            QX = band[b, 0] * design.X
            for d in range(1, order + 1):
                QX[d:] += band[b, d] * design.X[:-d]
                QX[:-d] += band[b, d] * design.X[d:]
            QX[:order] += head @ design.X[:order]
            QX[-order:] += tail @ design.X[-order:]
            G = covs[b] @ QX.T
            ops[b, :p] = G
            for k, (corner, Rr) in enumerate(zip((head, tail), R_ends)):
                lam, U = np.linalg.eigh(corner)
                weights[b, k * order:(k + 1) * order] = lam
                ops[b, p + k * order:p + (k + 1) * order] = U.T @ Rr
    return NoiseBins(rho=bin_rho, phi=phi, innovation_variance=err, acf=acf_head, order=used, covariance=covs,
                     information=info, band=band, refit_operator=ops, corner_weights=weights)


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


def fit_arp_summary(design: DesignFactors, Y: npt.NDArray[np.floating], lag_products: npt.NDArray[np.floating],
                    bin_index: npt.NDArray[np.integer], bins: NoiseBins) -> WhitenedBlock:
    """AR(p)-prewhitened refit of a block of voxels, bin by bin, without whitening the data.

    Parameters
    ----------
    design : DesignFactors
    Y : ndarray, shape (n_scans, n_voxels)
        Scaled signal.
    lag_products : ndarray, shape (order + 1, n_voxels)
        Lag products ``a_0..a_order`` of the block's OLS residuals (:func:`compute_lag_products`).
    bin_index : ndarray of int, shape (n_voxels,)
    bins : NoiseBins
        From :func:`prepare_bins` with ``bin_acf``.

    Returns
    -------
    WhitenedBlock

    Notes
    -----
    Per bin, with ``W`` the exact AR whitening (:func:`whiten_ar`) and
    ``Q = W' W``: ``beta = pinv(W X) W y`` (rows of ``bins.refit_operator``), and with the
    OLS estimate ``beta_o`` and residual ``e = y - X beta_o`` the whitened
    residual sum of squares is ``e'Qe - d' X'QX d``, ``d = beta - beta_o``
    (GLS, e.g. Seber & Lee (2003) *Linear Regression Analysis*, sec. 3.10).
    ``Q`` is banded Toeplitz but for its two corners (:class:`NoiseBins`), so
    ``e'Qe = sum_d g_d a_d + e_h' C_h e_h + e_t' C_t e_t`` from the residual lag
    products and the first and last ``order`` residuals (``C = sum_i l_i u_i u_i'``,
    ``e_h' C_h e_h = sum_i l_i (u_i' R y)^2``). All per-bin products are one
    product with ``bins.refit_operator``. This is the refit of ``W y`` on
    ``W X`` without forming ``W y``; checked against statsmodels GLS in
    ``tests/test_estimation.py``.
    """
    Y = np.asarray(Y, dtype=np.float64)
    lag_products = np.asarray(lag_products, dtype=np.float64)
    bin_index = np.asarray(bin_index)
    p, v = design.X.shape[1], Y.shape[1]
    beta = np.empty((p, v))
    rss = np.empty(v)
    beta_ols = multiply_columns(design.pinv, Y)
    # each bin a slice of columns: gather into bin order unless the caller did (glmsteps.fitting does)
    order = np.argsort(bin_index, kind="stable")
    if np.all(order == np.arange(v)):
        Ys = Y
    else:
        Ys = np.ascontiguousarray(Y[:, order])
    keys, starts = np.unique(bin_index[order], return_index=True)
    for b, lo, hi in zip(keys, starts, np.r_[starts[1:], v]):
        cols = order[lo:hi]
        rows = multiply_columns(bins.refit_operator[b], Ys[:, lo:hi])
        b_gls = rows[:p]
        delta = b_gls - beta_ols[:, cols]
        eqe = np.einsum("d,dv->v", bins.band[b], lag_products[:, cols])
        eqe += np.einsum("k,kv,kv->v", bins.corner_weights[b], rows[p:], rows[p:])
        # d' X'QX d element-wise (the same products for a voxel whatever the others)
        info_delta = bins.information[b, :, 0, None] * delta[0]
        for j in range(1, p):
            info_delta += bins.information[b, :, j, None] * delta[j]
        rss[cols] = eqe - np.einsum("iv,iv->v", delta, info_delta)
        beta[:, cols] = b_gls
    _settle_spikes(design, Y[design.spike_rows], beta)
    return WhitenedBlock(beta=beta, residual_variance=np.maximum(rss, 0.0) / design.dof)
