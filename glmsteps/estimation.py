"""Voxelwise GLM estimation: scaling, OLS, autocorrelation estimates, prewhitened refits.

Pure maths: arrays in, arrays out, no file access. Every function that touches
voxel data takes a *block* of voxels (``Y (n_scans, n_voxels)``); the loop over
blocks (chunks) lives in the I/O layer (``glmsteps.jobs.fit``). Results do not
depend on how the voxels are split into blocks: matrix products over voxels go
through :func:`multiply_columns`, which pads the voxel axis to a fixed multiple
so that the BLAS kernel computing each column is always the same, and per-voxel
reductions run along the scan axis only.

The fitting model, per voxel, is ``y = X beta + e`` with ``e`` zero-mean and
correlation matrix ``V``:

``ols``
    ``V = I``; ordinary least squares through the pseudo-inverse of ``X``.
``ar1``
    ``V`` of a stationary AR(1) process with coefficient ``rho``. ``rho`` is
    estimated per voxel from the OLS residuals with Worsley's bias correction
    (the lag-1/lag-0 residual ratio mapped through its expectation under AR(1)
    noise for this design, :func:`compute_ar1_correction`),
    optionally smoothed within the mask, rounded to bins of width 0.01, and
    each bin is refitted with the exact AR(1) whitening (Prais-Winsten, the
    first scan kept).
``arp``
    AR(q), q <= 4, from the residual autocorrelations corrected with Worsley's
    linear system (:func:`compute_bias_matrix`, first-order in the lags) by
    Yule-Walker (Levinson-Durbin), binned on the lag-1 autocorrelation, and
    refitted with the exact AR(q) whitening.

Censored volumes
    A censored volume carries its own regressor (role ``spike``: a column that
    is 1 at that volume and 0 elsewhere). For any correlation matrix ``V``,
    generalised least squares with such an indicator column gives exactly the
    same estimates of the other regressors, and the same residual sum of
    squares, as generalised least squares on the kept volumes alone with their
    marginal correlation matrix (for AR(1): ``rho ** |t_i - t_j|`` over the
    kept scan times, i.e. the gaps are treated as missing scans, not closed
    up). So whitening is applied to the full series including the indicator
    columns, and the degrees of freedom are ``n_scans - rank(X)``, which counts
    every censored volume as lost. In the OLS residuals used for the
    autocorrelation estimate the censored volumes are set to exactly zero, so
    they drop out of every lag product, and Worsley's correction (which is
    computed from the residual-forming matrix of the full design, indicator
    columns included) accounts for the missing products. After the fit, the
    coefficient of each indicator column is set to the value that makes the
    residual at its volume zero (``y_k - x_k' beta`` over the other columns);
    :func:`compute_residuals` returns exactly zero there. Indicator
    coefficients are nuisance values, not for inference.

Dropped initial volumes are simply absent: ``X`` and ``Y`` start at the first
kept volume, and the whitening treats that volume as the start of the series.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Literal, Sequence

import numpy as np
import numpy.typing as npt

from .errors import DesignError, GlmstepsWarning

ScalingMethod = Literal["percent", "grand_mean", "none"]
NoiseModel = Literal["ols", "ar1", "arp"]

#: Largest supported AR order.
MAX_AR_ORDER = 4
#: Largest magnitude of a lag-1 coefficient used for whitening.
MAX_ABS_RHO = 0.99
#: Residual degrees of freedom required per AR coefficient for an order to "fit" the design.
MIN_DOF_PER_AR_COEFFICIENT = 10
#: Smallest reciprocal condition number of Worsley's bias matrix for an order to "fit".
MIN_BIAS_MATRIX_RCOND = 1e-8
#: The voxel axis of every matrix product is padded to a multiple of this width.
_COLUMN_BLOCK = 64

FloatArray = npt.NDArray[np.float64]


# ---------------------------------------------------------------------------
# deterministic products over voxels
# ---------------------------------------------------------------------------

def multiply_columns(A: npt.ArrayLike, B: npt.NDArray[np.floating]) -> FloatArray:
    """``A @ B`` computed so that each column does not depend on how many columns ``B`` has.

    Parameters
    ----------
    A : array_like, shape (m, k)
    B : ndarray, shape (k, n_voxels)

    Returns
    -------
    ndarray, shape (m, n_voxels), float64

    Notes
    -----
    BLAS matrix products use different micro-kernels for the last, partial
    block of columns, so a column's value can change in the last bit with the
    number of columns. Padding the column count to a multiple of 64 makes every
    column go through a full block, which makes chunked and whole-array results
    identical (checked in ``tests/test_estimation.py``).
    """
    A = np.asarray(A, dtype=np.float64)
    n = B.shape[1]
    padded = -(-n // _COLUMN_BLOCK) * _COLUMN_BLOCK
    if padded == n:
        return A @ np.asarray(B, dtype=np.float64)
    Bp = np.zeros((B.shape[0], padded), dtype=np.float64)
    Bp[:, :n] = B
    return (A @ Bp)[:, :n]


# ---------------------------------------------------------------------------
# scaling
# ---------------------------------------------------------------------------

def compute_scale_factors(mean_signal: npt.ArrayLike, method: ScalingMethod,
                          grand_mean_value: float = 100.0) -> FloatArray:
    """Per-voxel factors that scale a run's signal.

    Parameters
    ----------
    mean_signal : array_like, shape (n_voxels,)
        Temporal mean of each fitted voxel over the kept volumes (image units).
    method : {"percent", "grand_mean", "none"}
        ``percent``: ``100 / mean`` per voxel, so the scaled series has mean 100
        and a beta of 1 is a 1 % signal change. ``grand_mean``: one factor for
        the whole run, ``grand_mean_value / mean(mean_signal)``, so the mean over
        the mask of the temporal means becomes ``grand_mean_value``. ``none``:
        factors of 1.
    grand_mean_value : float
        Target grand mean (default 100).

    Returns
    -------
    ndarray, shape (n_voxels,), float64
        Multiply ``Y`` column-wise by these.

    Notes
    -----
    Percent signal change, ``100 * y / mean(y)``, and grand-mean scaling of the
    whole mask to a common value (100 by default) are common practice. The
    grand mean is taken over the fitted voxels only (inside the mask, finite,
    non-constant), not over the whole image.
    """
    mean_signal = np.asarray(mean_signal, dtype=np.float64)
    if method == "percent":
        with np.errstate(divide="ignore"):
            return 100.0 / mean_signal
    if method == "grand_mean":
        grand = float(np.mean(mean_signal)) if mean_signal.size else 1.0
        return np.full(mean_signal.shape, grand_mean_value / grand)
    if method == "none":
        return np.ones(mean_signal.shape)
    raise ValueError(f"unknown scaling method {method!r}")


# ---------------------------------------------------------------------------
# design preparation
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class DesignFactors:
    """Everything about a design that the voxel fits reuse.

    Attributes
    ----------
    X : ndarray, shape (n_scans, n_regressors), float64
    pinv : ndarray, shape (n_regressors, n_scans)
        Moore-Penrose pseudo-inverse of ``X`` (SVD).
    rank : int
    dof : int
        ``n_scans - rank``.
    censored : ndarray of bool, shape (n_scans,)
        Volumes that carry their own indicator (``spike``) column.
    spike_columns : ndarray of bool, shape (n_regressors,)
    spike_rows : ndarray of int, shape (n_spikes,)
        For each spike column (in order), the volume it marks.
    lag_design : ndarray, shape (n_scans, n_regressors)
        ``D1 @ X`` with ``D1`` the symmetric lag-1 matrix (ones on both first
        off-diagonals).
    """

    X: FloatArray
    pinv: FloatArray
    rank: int
    dof: int
    censored: npt.NDArray[np.bool_]
    spike_columns: npt.NDArray[np.bool_]
    spike_rows: npt.NDArray[np.int64]
    lag_design: FloatArray


def prepare_design(X: npt.ArrayLike, roles: Sequence[str]) -> DesignFactors:
    """Factor a design for repeated voxel fits.

    Parameters
    ----------
    X : array_like, shape (n_scans, n_regressors)
        The design of the kept volumes.
    roles : sequence of str, length n_regressors
        Column roles; ``spike`` columns must be single-volume indicators.

    Returns
    -------
    DesignFactors

    Raises
    ------
    DesignError
        If a spike column is not 1 at exactly one volume and 0 elsewhere, or if
        the design leaves no residual degrees of freedom.

    Warns
    -----
    GlmstepsWarning
        If the design is rank deficient (estimates then use the pseudo-inverse).
    """
    X = np.asarray(X, dtype=np.float64)
    n, p = X.shape
    roles = list(roles)
    spike_columns = np.array([r == "spike" for r in roles], dtype=bool)
    spike_rows = []
    for j in np.flatnonzero(spike_columns):
        nz = np.flatnonzero(X[:, j] != 0)
        if nz.size != 1 or X[nz[0], j] != 1.0:
            raise DesignError(f"design column {j} (role spike) is not 1 at exactly one volume and 0 elsewhere; "
                              "rebuild the design")
        spike_rows.append(int(nz[0]))
    censored = np.zeros(n, dtype=bool)
    censored[spike_rows] = True
    U, s, Vt = np.linalg.svd(X, full_matrices=False)
    tol = s.max(initial=0.0) * max(n, p) * np.finfo(np.float64).eps
    keep = s > tol
    rank = int(keep.sum())
    pinv = (Vt[keep].T / s[keep]) @ U[:, keep].T
    if rank < p:
        warnings.warn(f"design has {p} columns but rank {rank}; estimates use the pseudo-inverse and only "
                      "estimable contrasts are meaningful", GlmstepsWarning, stacklevel=2)
    dof = n - rank
    if dof < 1:
        raise DesignError(f"design has {n} volumes and rank {rank}: no residual degrees of freedom; "
                          "use fewer regressors or more volumes")
    lag = np.zeros_like(X)
    lag[1:] += X[:-1]
    lag[:-1] += X[1:]
    return DesignFactors(X=X, pinv=pinv, rank=rank, dof=dof, censored=censored, spike_columns=spike_columns,
                         spike_rows=np.asarray(spike_rows, dtype=np.int64), lag_design=lag)


# ---------------------------------------------------------------------------
# OLS
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class OlsBlock:
    """OLS results of a block of voxels.

    Attributes
    ----------
    beta : ndarray, shape (n_regressors, n_voxels), float64
    residuals : ndarray, shape (n_scans, n_voxels), float64
        Exactly zero at censored volumes.
    residual_variance : ndarray, shape (n_voxels,)
        ``sum(residuals**2) / dof``.
    """

    beta: FloatArray
    residuals: FloatArray
    residual_variance: FloatArray


def fit_ols(design: DesignFactors, Y: npt.NDArray[np.floating]) -> OlsBlock:
    """Ordinary least squares of a block of voxels.

    Parameters
    ----------
    design : DesignFactors
    Y : ndarray, shape (n_scans, n_voxels)
        Scaled signal.

    Returns
    -------
    OlsBlock

    Notes
    -----
    ``beta = pinv(X) y``, ``e = y - X beta``, ``sigma^2 = e'e / (n - rank X)``
    (any linear-models text, e.g. Seber & Lee (2003) *Linear Regression
    Analysis*, ch. 3).
    """
    Y = np.asarray(Y, dtype=np.float64)
    beta = multiply_columns(design.pinv, Y)
    residuals = multiply_columns(design.X, beta)
    np.subtract(Y, residuals, out=residuals)
    residuals[design.censored] = 0.0
    rss = np.einsum("tv,tv->v", residuals, residuals)
    return OlsBlock(beta=beta, residuals=residuals, residual_variance=rss / design.dof)


def compute_residuals(design: DesignFactors, Y: npt.NDArray[np.floating],
                      beta: npt.NDArray[np.floating]) -> FloatArray:
    """Residuals ``y - X beta`` of a block, exactly zero at censored volumes.

    Parameters
    ----------
    design : DesignFactors
    Y : ndarray, shape (n_scans, n_voxels)
    beta : ndarray, shape (n_regressors, n_voxels)

    Returns
    -------
    ndarray, shape (n_scans, n_voxels), float64
    """
    res = np.asarray(Y, dtype=np.float64) - multiply_columns(design.X, np.asarray(beta, dtype=np.float64))
    res[design.censored] = 0.0
    return res


# ---------------------------------------------------------------------------
# autocorrelation estimates with Worsley's bias correction
# ---------------------------------------------------------------------------

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


def gaussian_kernel(sigma: float, truncate: float = 4.0) -> FloatArray:
    """Normalised 1D Gaussian weights.

    Parameters
    ----------
    sigma : float
        Standard deviation (voxels).
    truncate : float
        The kernel reaches ``int(truncate * sigma + 0.5)`` voxels each side.

    Returns
    -------
    ndarray, shape (2 r + 1,)
        ``exp(-x^2 / (2 sigma^2))`` for ``x = -r..r``, summing to 1.
    """
    radius = int(truncate * sigma + 0.5)
    x = np.arange(-radius, radius + 1, dtype=np.float64)
    w = np.exp(-0.5 * (x / sigma) ** 2) if sigma > 0 else (x == 0).astype(np.float64)
    return w / w.sum()


def convolve_axis(values: FloatArray, weights: FloatArray, axis: int) -> FloatArray:
    """Convolve along one axis with a symmetric kernel, zero outside the array.

    Parameters
    ----------
    values : ndarray, float64
    weights : ndarray, shape (2 r + 1,)
        Symmetric weights (``weights[r + k] == weights[r - k]``).
    axis : int

    Returns
    -------
    ndarray, same shape as ``values``, float64
    """
    a = np.moveaxis(values, axis, 0)
    r = (weights.size - 1) // 2
    out = weights[r] * a
    for k in range(1, min(r, a.shape[0] - 1) + 1):
        out[:-k] += weights[r + k] * a[k:]
        out[k:] += weights[r - k] * a[:-k]
    return np.moveaxis(out, 0, axis)


def smooth_within_mask(values: npt.NDArray[np.floating], mask: npt.NDArray[np.bool_], fwhm_mm: float,
                       voxel_size_mm: npt.ArrayLike) -> FloatArray:
    """Gaussian smoothing restricted to a mask (normalised convolution).

    Parameters
    ----------
    values : ndarray, shape (nx, ny, nz)
        Values; only those inside ``mask`` are used.
    mask : ndarray of bool, shape (nx, ny, nz)
    fwhm_mm : float
        Full width at half maximum of the kernel (mm); 0 returns the input.
    voxel_size_mm : array_like, shape (3,)

    Returns
    -------
    ndarray, shape (nx, ny, nz), float64
        Smoothed values inside the mask, 0 outside.

    Notes
    -----
    ``s = G * (m v) / G * m`` with ``G`` the Gaussian kernel, ``sigma = FWHM /
    sqrt(8 ln 2)``, truncated at 4 sigma: normalised convolution (Knutsson &
    Westin (1993), "Normalized and differential convolution", CVPR), so that
    values near the mask edge are averaged over the mask only and not pulled
    toward zero. The separable convolution is done with numpy slices: the fit
    job then needs no scipy, whose import alone (0.3-0.4 s) weighed on small
    runs (``tests/benchmarks/README.md``).
    """
    m = np.asarray(mask, dtype=bool)
    vals = np.where(m, np.asarray(values, dtype=np.float64), 0.0)
    if fwhm_mm <= 0:
        return vals
    sigma = fwhm_mm / math.sqrt(8.0 * math.log(2.0)) / np.asarray(voxel_size_mm, dtype=np.float64)
    den = m.astype(np.float64)
    for axis in range(m.ndim):
        w = gaussian_kernel(float(sigma[axis]))
        vals = convolve_axis(vals, w, axis)
        den = convolve_axis(den, w, axis)
    np.divide(vals, den, out=vals, where=m & (den > 0))
    vals[~m] = 0.0
    return vals


def assign_bins(rho: npt.ArrayLike, bin_width: float = 0.01) -> tuple[npt.NDArray[np.int32], FloatArray]:
    """Round lag-1 coefficients to bins.

    Parameters
    ----------
    rho : array_like, shape (n_voxels,)
    bin_width : float
        Bin width (coefficient units, default 0.01).

    Returns
    -------
    bin_index : ndarray of int32, shape (n_voxels,)
        Index into ``bin_rho``.
    bin_rho : ndarray, shape (n_bins,), float64
        Sorted bin centres ``k * bin_width``, within ``+-MAX_ABS_RHO``.
    """
    rho = np.clip(np.asarray(rho, dtype=np.float64), -MAX_ABS_RHO, MAX_ABS_RHO)
    k = np.round(rho / bin_width).astype(np.int64)
    kmax = int(math.floor(MAX_ABS_RHO / bin_width + 1e-9))
    k = np.clip(k, -kmax, kmax)
    keys, index = np.unique(k, return_inverse=True)
    return index.astype(np.int32).reshape(rho.shape), keys * bin_width


# ---------------------------------------------------------------------------
# whitening
# ---------------------------------------------------------------------------

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


def _apply_bin_matrices(matrices: FloatArray, bin_index: npt.NDArray[np.integer], Z: FloatArray) -> FloatArray:
    """``out[:, v] = matrices[bin_index[v]] @ Z[:, v]`` with element-wise arithmetic (chunk independent).

    Bin by bin, so that each bin's matrix is broadcast instead of gathered for every voxel
    (the same products and sums, in the same order, as a per-voxel matrix-vector product).
    """
    out = np.empty((matrices.shape[1], Z.shape[1]))
    for b in np.unique(bin_index):
        cols = np.flatnonzero(bin_index == b)
        Zb = Z[:, cols]
        acc = np.zeros((matrices.shape[1], cols.size))
        for j in range(matrices.shape[2]):
            acc += matrices[b, :, j, None] * Zb[j]
        out[:, cols] = acc
    return out


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

    @property
    def lag_products(self) -> FloatArray:
        """``a_0, a_1`` as returned by :func:`compute_lag_products` (shape (2, n_voxels))."""
        return np.stack([self.e0, 2.0 * self.e1])


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
    delta = _apply_bin_matrices(bins.covariance, bin_index, z)
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
