"""Autocorrelation estimates of OLS residuals with Worsley's bias correction.

Pure maths: arrays in, arrays out, no file access (see :mod:`glmsteps.estimation`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from .ols import DesignFactors, FloatArray

#: Largest supported AR order.
MAX_AR_ORDER = 4
#: Largest magnitude of a lag-1 coefficient used for whitening.
MAX_ABS_RHO = 0.99
#: Residual degrees of freedom required per AR coefficient for an order to "fit" the design.
MIN_DOF_PER_AR_COEFFICIENT = 10
#: Smallest reciprocal condition number of Worsley's bias matrix for an order to "fit".
MIN_BIAS_MATRIX_RCOND = 1e-8


def compute_lag_products(residuals: npt.NDArray[np.floating], max_lag: int) -> FloatArray:
    """Residual lag products ``a_j = r' D_j r`` for ``j = 0..max_lag``.

    Parameters
    ----------
    residuals : ndarray, shape (n_scans, n_voxels)
    max_lag : int

    Returns
    -------
    ndarray, shape (max_lag + 1, n_voxels), float64
        ``a_0 = sum_t r_t^2`` and ``a_j = 2 sum_t r_t r_{t+j}`` (``D_j`` is the
        symmetric matrix with ones on the j-th off-diagonals).
    """
    r = np.asarray(residuals, dtype=np.float64)
    out = np.empty((max_lag + 1, r.shape[1]))
    out[0] = np.einsum("tv,tv->v", r, r)
    for j in range(1, max_lag + 1):
        out[j] = 2.0 * np.einsum("tv,tv->v", r[j:], r[:-j])
    return out


def compute_bias_matrix(X: npt.ArrayLike, max_lag: int) -> FloatArray:
    """Worsley's matrix ``M_jl = trace(R D_j R D_l)``, ``j, l = 0..max_lag``.

    Parameters
    ----------
    X : array_like, shape (n_scans, n_regressors)
        The full design (indicator columns of censored volumes included).
    max_lag : int

    Returns
    -------
    ndarray, shape (max_lag + 1, max_lag + 1), float64

    Notes
    -----
    With ``R = I - X pinv(X)`` the residual-forming matrix, ``r = R y`` and the
    noise correlation approximated as ``V = sum_l rho_l D_l`` (``rho_0 = 1``,
    ``D_0 = I``), ``E[r' D_j r] = sigma^2 sum_l M_jl rho_l``. In particular
    ``M_00 = trace(R)`` and ``M_01 = trace(R D_1)``. Worsley et al. (2002), "A
    general statistical analysis for fMRI data", NeuroImage 15:1-15, section
    on autocorrelated errors (from memory).
    """
    X = np.asarray(X, dtype=np.float64)
    n = X.shape[0]
    R = np.eye(n) - X @ np.linalg.pinv(X)
    RD = []
    for j in range(max_lag + 1):
        if j == 0:
            RD.append(R)
            continue
        A = np.zeros_like(R)
        A[:, j:] += R[:, :-j]
        A[:, :-j] += R[:, j:]
        RD.append(A)
    M = np.empty((max_lag + 1, max_lag + 1))
    for j in range(max_lag + 1):
        for l in range(max_lag + 1):
            M[j, l] = np.sum(RD[j] * RD[l].T)
    return M


def correct_autocorrelation(lag_products: npt.NDArray[np.floating], bias_matrix: npt.ArrayLike) -> FloatArray:
    """Bias-corrected autocorrelations from residual lag products.

    Parameters
    ----------
    lag_products : ndarray, shape (max_lag + 1, n_voxels)
        From :func:`compute_lag_products`.
    bias_matrix : array_like, shape (max_lag + 1, max_lag + 1)
        From :func:`compute_bias_matrix`.

    Returns
    -------
    ndarray, shape (max_lag, n_voxels), float64
        Corrected autocorrelations at lags 1..max_lag.

    Notes
    -----
    Solve ``M rho~ = a`` and normalise, ``rho_l = rho~_l / rho~_0`` (Worsley et
    al. 2002, NeuroImage 15:1-15; from memory). For one lag this is the ratio
    solved from ``a_0 = s (M_00 + M_01 rho)``, ``a_1 = s (M_10 + M_11 rho)``.
    """
    a = np.asarray(lag_products, dtype=np.float64)
    sol = np.linalg.solve(np.asarray(bias_matrix, dtype=np.float64), a)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = sol[1:] / sol[0]
    return np.where(np.isfinite(rho), rho, 0.0)


@dataclass(frozen=True)
class Ar1Correction:
    """The expected residual lag-1 ratio of a design as a function of the AR(1) coefficient.

    Attributes
    ----------
    rho_grid : ndarray, shape (k,)
        Coefficients from ``-MAX_ABS_RHO`` to ``MAX_ABS_RHO``.
    ratio_grid : ndarray, shape (k,)
        ``g(rho) = trace(R D_1 R V(rho)) / trace(R V(rho))``, increasing in ``rho``.
    """

    rho_grid: FloatArray
    ratio_grid: FloatArray


def compute_ar1_correction(X: npt.ArrayLike, step: float = 0.001) -> Ar1Correction:
    """Tabulate the expected residual lag-1 ratio under AR(1) noise for a design.

    Parameters
    ----------
    X : array_like, shape (n_scans, n_regressors)
        The full design (indicator columns of censored volumes included).
    step : float
        Grid step of the coefficient.

    Returns
    -------
    Ar1Correction

    Notes
    -----
    With ``R = I - X pinv(X)``, residuals ``r = R y`` and AR(1) noise of
    correlation ``V(rho) = sum_k rho^k D_k`` (``D_0 = I``, ``D_k`` the symmetric
    lag-k matrix), ``E[r'r] = sigma^2 trace(R V)`` (which is ``a0 = trace(R)``
    at ``rho = 0``) and ``E[r' D_1 r] = sigma^2 trace(R D_1 R V)`` (``a1 =
    trace(R D_1)`` at ``rho = 0``). Both are polynomials in ``rho`` whose
    coefficients are sums along the diagonals of ``R`` and ``R D_1 R``, so the
    ratio can be tabulated finely at the cost of one ``n x n`` product. This
    is the bias correction of Worsley et al. (2002), "A general statistical
    analysis for fMRI data", NeuroImage 15:1-15 (from memory), taken with the
    full AR(1) correlation instead of its first-order truncation
    ``V = I + rho D_1``; the truncation leaves a bias of about -0.02 at
    ``rho = 0.4`` on a 120-scan run, the full form does not
    (``tests/test_estimation.py``).
    """
    X = np.asarray(X, dtype=np.float64)
    n = X.shape[0]
    R = np.eye(n) - X @ np.linalg.pinv(X)
    RD = np.zeros_like(R)
    RD[:, 1:] += R[:, :-1]
    RD[:, :-1] += R[:, 1:]
    RDR = RD @ R
    lag_of_entry = np.abs(np.subtract.outer(np.arange(n), np.arange(n))).ravel()

    def diagonal_sums(A: FloatArray) -> FloatArray:
        # entry k: sum of A over |i - j| = k, i.e. trace(A D_k)
        return np.bincount(lag_of_entry, weights=A.ravel(), minlength=n)
    t0 = diagonal_sums(R)
    t1 = diagonal_sums(RDR)
    rho = np.arange(-MAX_ABS_RHO, MAX_ABS_RHO + step / 2, step)
    ratio = np.polynomial.polynomial.polyval(rho, t1) / np.polynomial.polynomial.polyval(rho, t0)
    # keep the monotone part (the ratio increases with rho for any design with residual dof > 1)
    ratio = np.maximum.accumulate(ratio)
    return Ar1Correction(rho_grid=rho, ratio_grid=ratio)


def correct_ar1(lag_products: npt.NDArray[np.floating], correction: Ar1Correction) -> FloatArray:
    """Bias-corrected AR(1) coefficients from residual lag products.

    Parameters
    ----------
    lag_products : ndarray, shape (>= 2, n_voxels)
        From :func:`compute_lag_products` (``a_0``, ``a_1``, ...).
    correction : Ar1Correction
        From :func:`compute_ar1_correction` for the same design.

    Returns
    -------
    ndarray, shape (n_voxels,)
        The coefficient whose expected ratio ``g(rho)`` equals the observed
        ``a_1 / a_0``, by linear interpolation in the table, within
        ``+-MAX_ABS_RHO``.
    """
    a = np.asarray(lag_products, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.nan_to_num(a[1] / a[0])
    return np.interp(q, correction.ratio_grid, correction.rho_grid)


def raw_autocorrelation(lag_products: npt.NDArray[np.floating]) -> FloatArray:
    """Uncorrected residual autocorrelations ``a_j / (2 a_0)``, lags 1..max_lag, shape (max_lag, n_voxels)."""
    a = np.asarray(lag_products, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.nan_to_num(a[1:] / (2.0 * a[0]))


def levinson_durbin(acf: npt.NDArray[np.floating]) -> tuple[FloatArray, FloatArray, npt.NDArray[np.int64]]:
    """Yule-Walker AR coefficients from autocorrelations, voxel by voxel, stationary by construction.

    Parameters
    ----------
    acf : ndarray, shape (order, n_voxels)
        Autocorrelations at lags 1..order (lag 0 is 1).

    Returns
    -------
    phi : ndarray, shape (order, n_voxels)
        AR coefficients (``y_t = sum_k phi_k y_{t-k} + u_t``).
    innovation_variance : ndarray, shape (n_voxels,)
        ``var(u_t) / var(y_t)``.
    order_used : ndarray of int, shape (n_voxels,)
        Where a reflection coefficient reaches magnitude ``MAX_ABS_RHO`` the
        recursion stops at the previous order (the autocorrelations are not
        those of a stationary process of higher order); higher coefficients
        are 0.

    Notes
    -----
    Levinson-Durbin recursion: ``k_m = (r_m - sum_j phi_{m-1,j} r_{m-j}) / E_{m-1}``,
    ``phi_{m,j} = phi_{m-1,j} - k_m phi_{m-1,m-j}``, ``E_m = E_{m-1} (1 - k_m^2)``
    (Brockwell & Davis (1991) *Time Series: Theory and Methods*, sec. 5.2).
    """
    r = np.atleast_2d(np.asarray(acf, dtype=np.float64))
    order, v = r.shape
    phi = np.zeros((order, v))
    err = np.ones(v)
    active = np.ones(v, dtype=bool)
    used = np.zeros(v, dtype=np.int64)
    for m in range(1, order + 1):
        acc = r[m - 1].copy()
        for j in range(1, m):
            acc -= phi[j - 1] * r[m - j - 1]
        k = acc / err
        ok = active & (np.abs(k) < MAX_ABS_RHO)
        if m == 1:
            k = np.clip(k, -MAX_ABS_RHO, MAX_ABS_RHO)
            ok = active.copy()
        new = phi.copy()
        for j in range(1, m):
            new[j - 1] = phi[j - 1] - k * phi[m - j - 1]
        new[m - 1] = k
        phi = np.where(ok, new, phi)
        err = np.where(ok, err * (1.0 - k * k), err)
        used = np.where(ok, m, used)
        active = ok
    return phi, err, used


def check_ar_order(design: DesignFactors, order: int) -> int:
    """The largest AR order ``<= order`` that fits the design.

    Parameters
    ----------
    design : DesignFactors
    order : int
        Requested order, 1..4.

    Returns
    -------
    int
        ``q`` in 1..order (1 if even AR(1) does not fit: AR(1) is always tried).

    Notes
    -----
    An AR(q) model *fits* a design when (a) the residual degrees of freedom
    are at least ``MIN_DOF_PER_AR_COEFFICIENT`` (10) per coefficient,
    ``n - rank(X) >= 10 q`` (common practice for autoregressive estimates), and
    (b) Worsley's bias matrix of lags 0..q can be inverted reliably: its
    reciprocal condition number is at least ``1e-8``.
    """
    best = 1
    for q in range(1, min(order, MAX_AR_ORDER) + 1):
        if design.dof < MIN_DOF_PER_AR_COEFFICIENT * q:
            break
        M = compute_bias_matrix(design.X, q)
        if 1.0 / np.linalg.cond(M) < MIN_BIAS_MATRIX_RCOND:
            break
        best = q
    return best


def autocorrelation_of_ar(phi: npt.ArrayLike, n_lags: int) -> FloatArray:
    """Autocorrelations ``r_0..r_{n_lags-1}`` of a stationary AR(q) process.

    Parameters
    ----------
    phi : array_like, shape (q,)
    n_lags : int

    Returns
    -------
    ndarray, shape (n_lags,)

    Notes
    -----
    Solves the Yule-Walker equations for ``r_1..r_q`` and extends with
    ``r_k = sum_j phi_j r_{k-j}`` (Brockwell & Davis (1991), sec. 3.3).
    """
    phi = np.asarray(phi, dtype=np.float64)
    q = phi.size
    r = np.zeros(max(n_lags, q + 1))
    r[0] = 1.0
    if q:
        # r_k - sum_{j != k} phi_j r_{|k-j|} = phi_k r_0, k = 1..q
        A = np.eye(q)
        for k in range(1, q + 1):
            for j in range(1, q + 1):
                if j != k:
                    A[k - 1, abs(k - j) - 1] -= phi[j - 1]
        r[1:q + 1] = np.linalg.solve(A, phi)
        for k in range(q + 1, r.size):
            r[k] = sum(phi[j - 1] * r[k - j] for j in range(1, q + 1))
    return r[:n_lags]

