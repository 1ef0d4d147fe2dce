"""Autocorrelation estimates of OLS residuals with Worsley's bias correction, taken in full.

Pure maths: arrays in, arrays out, no file access (see :mod:`glmsteps.estimation`).

Notation: ``R = I - X pinv(X)`` is the residual-forming matrix of the full
design (indicator columns of censored volumes included), ``D_0 = I`` and
``D_j`` (``j >= 1``) the symmetric matrix with ones on the two j-th
off-diagonals, so that the residual lag products of :func:`compute_lag_products`
are ``a_j = e' D_j e``. Under noise of autocorrelation ``rho_k`` (all lags
``k = 0..n-1``) and variance ``s``,

    ``E[a_j] = s sum_k M_jk rho_k``,  ``M_jk = trace(R D_j R D_k)``      (1)

(Worsley et al. 2002, "A general statistical analysis for fMRI data",
NeuroImage 15:1-15, sec. 3.3 on the bias of the autocorrelations; from memory,
equation number not checked). Worsley solves (1) with the sum truncated at the
model order ``k <= p`` (:func:`truncated_autocorrelation`);
:func:`estimate_autocorrelation` keeps every lag (the lags beyond ``p`` follow
from the fitted AR(p) model) and adds the second-order terms of the ratios
``a_j / a_0`` (:func:`compute_ratio_moments`), which the expectation (1) alone
leaves at about ``-2 rho / n`` for AR(1) noise (Marriott & Pope 1954,
Biometrika 41:390, from memory). With them the estimates are unbiased at
every lag within the Monte-Carlo error of 20,000-voxel simulations of AR(1)
and AR(2) noise, where the truncated correction misses by many standard errors
(``tests/test_calibration.py``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from .ols import DesignFactors, FloatArray, apply_group_matrices

#: Largest supported AR order.
MAX_AR_ORDER = 12
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


# ---------------------------------------------------------------------------
# design moments (1)
# ---------------------------------------------------------------------------

def _lag_sums_of_outer(A: FloatArray, B: FloatArray, n_lags: int) -> FloatArray:
    """``trace(A B' D_k)`` for ``k = 0..n_lags-1`` (``A``, ``B`` of shape (n, r)), by FFT.

    ``trace(A B' D_k)`` is the sum of ``A B'`` over the entries with
    ``|i - j| = k``; with ``c(k) = sum_m sum_i A_im B_(i+k)m`` it is ``c(0)``
    at ``k = 0`` and ``c(k) + c(-k)`` above (cross-correlation theorem).
    """
    n = A.shape[0]
    size = 1 << int(np.ceil(np.log2(2 * n)))
    spec = np.sum(np.conj(np.fft.rfft(A, size, axis=0)) * np.fft.rfft(B, size, axis=0), axis=1)
    c = np.fft.irfft(spec, size)
    out = c[:n_lags].copy()
    out[1:] += c[size - np.arange(1, n_lags)]
    return out


def _shift_sum(Z: FloatArray, j: int) -> FloatArray:
    """``D_j Z`` (``D_0 = I``)."""
    if j == 0:
        return Z.copy()
    out = np.zeros_like(Z)
    out[j:] += Z[:-j]
    out[:-j] += Z[j:]
    return out


def compute_lag_moments(design: DesignFactors, max_lag: int) -> FloatArray:
    """Worsley's moments ``M_jk = trace(R D_j R D_k)`` for ``j = 0..max_lag`` and every lag ``k``.

    Parameters
    ----------
    design : DesignFactors
        The full design (indicator columns of censored volumes included).
    max_lag : int

    Returns
    -------
    ndarray, shape (max_lag + 1, n_scans), float64
        Row ``j`` holds ``M_jk`` for ``k = 0..n_scans-1``, so that
        ``E[a_j] = s sum_k M_jk rho_k`` (equation (1) of the module docstring).

    Notes
    -----
    With ``U`` an orthonormal basis of the columns of ``X`` (``R = I - U U'``),
    ``R D_j R = D_j - (D_j U) U' - U (R D_j U)'``, so each row needs two
    rank-``r`` lag sums (FFT, ``O(r n log n)``) instead of an ``n x n``
    product. ``M_00 = trace(R) = n - rank``; checked against the dense traces
    in ``tests/test_estimation.py``.
    """
    U = design.column_basis
    n = U.shape[0]
    M = np.zeros((max_lag + 1, n))
    for j in range(max_lag + 1):
        M[j, j] = n if j == 0 else 2.0 * (n - j)
        DU = _shift_sum(U, j)
        RDU = DU - U @ (U.T @ DU)
        M[j] -= _lag_sums_of_outer(DU, U, n) + _lag_sums_of_outer(U, RDU, n)
    return M


def ar_autocorrelation(phi: npt.NDArray[np.floating], n_lags: int) -> FloatArray:
    """Autocorrelations ``rho_0..rho_(n_lags-1)`` of stationary AR(q) models, model by model.

    Parameters
    ----------
    phi : ndarray, shape (q, n_models)
        AR coefficients (``y_t = sum_k phi_k y_(t-k) + u_t``).
    n_lags : int

    Returns
    -------
    ndarray, shape (n_lags, n_models)

    Notes
    -----
    Solves the Yule-Walker equations for ``rho_1..rho_q`` and extends with
    ``rho_k = sum_j phi_j rho_(k-j)`` (Brockwell & Davis (1991) *Time Series:
    Theory and Methods*, sec. 3.3).
    """
    phi = np.atleast_2d(np.asarray(phi, dtype=np.float64))
    q, b = phi.shape
    r = np.zeros((max(n_lags, q + 1), b))
    r[0] = 1.0
    if q:
        # rho_k - sum_{j != k} phi_j rho_|k-j| = phi_k, k = 1..q
        A = np.broadcast_to(np.eye(q), (b, q, q)).copy()
        for k in range(1, q + 1):
            for j in range(1, q + 1):
                if j != k:
                    A[:, k - 1, abs(k - j) - 1] -= phi[j - 1]
        r[1:q + 1] = np.linalg.solve(A, phi.T[:, :, None])[:, :, 0].T
        for k in range(q + 1, r.shape[0]):
            r[k] = np.einsum("jb,jb->b", phi, r[k - 1::-1][:q])
    return r[:n_lags]


def autocorrelation_of_ar(phi: npt.ArrayLike, n_lags: int) -> FloatArray:
    """Autocorrelations ``rho_0..rho_(n_lags-1)`` of one stationary AR(q) process, shape (n_lags,).

    See :func:`ar_autocorrelation`.
    """
    return ar_autocorrelation(np.asarray(phi, dtype=np.float64).reshape(-1, 1), n_lags)[:, 0]


def extend_autocorrelation(acf: npt.NDArray[np.floating], n_lags: int) -> FloatArray:
    """Every lag of the AR(p) model whose first p autocorrelations are ``acf``, model by model.

    Parameters
    ----------
    acf : ndarray, shape (p, n_models)
        Autocorrelations at lags 1..p.
    n_lags : int

    Returns
    -------
    ndarray, shape (n_lags, n_models)
        ``rho_0 = 1``, then the autocorrelations of the Yule-Walker AR model
        (:func:`levinson_durbin`: where the lags are not those of a
        stationary AR(p) the order is lowered and the lags above it follow
        from the lower-order model).
    """
    phi, _, _ = levinson_durbin(acf)
    return ar_autocorrelation(phi, n_lags)


# ---------------------------------------------------------------------------
# ratio bias
# ---------------------------------------------------------------------------

def compute_ratio_moments(design: DesignFactors, moments: npt.NDArray[np.floating],
                          rho: npt.NDArray[np.floating]) -> tuple[FloatArray, FloatArray]:
    """Second-order bias and covariance of the residual lag ratios ``q_j = a_j / a_0`` under given autocorrelations.

    Parameters
    ----------
    design : DesignFactors
    moments : ndarray, shape (p + 1, n_scans)
        From :func:`compute_lag_moments`.
    rho : ndarray, shape (n_scans, n_models)
        Noise autocorrelations at every lag of each model (``rho[0] = 1``).

    Returns
    -------
    bias : ndarray, shape (p, n_models)
        ``E[q_j] - E[a_j] / E[a_0]`` for ``j = 1..p``, to second order.
    covariance : ndarray, shape (n_models, p, p)
        ``cov(q_i, q_j)`` to first order.

    Notes
    -----
    For a ratio of random variables, ``E[N / D] = mu_N / mu_D - cov(N, D) / mu_D^2
    + mu_N var(D) / mu_D^3`` and ``cov(N_i / D, N_j / D) = (C_ij - q_i C_0j - q_j C_i0
    + q_i q_j C_00) / mu_D^2`` up to terms of order ``n^-2`` (delta method, e.g.
    Stuart & Ord (1994) *Kendall's Advanced Theory of Statistics* vol. 1, sec. 10.5).
    With Gaussian noise ``y ~ N(0, V)``, ``a_j = y' R D_j R y`` and ``S = R V R``:
    ``C_ij = cov(a_i, a_j) = 2 trace(D_i S D_j S)`` (the covariance of Gaussian
    quadratic forms, ``cov(y'Ay, y'By) = 2 trace(A V B V)``, Searle (1971) *Linear
    Models*, sec. 2.5) and ``mu_j = sum_k M_jk rho_k``. ``S`` is formed from ``V``
    and the column basis ``U``: ``S = V - W U' - U W'`` with
    ``W = V U - U (U' V U) / 2``. Checked against dense traces and a Monte-Carlo
    mean of ``a_j / a_0`` in ``tests/test_estimation.py``.
    """
    rho = np.asarray(rho, dtype=np.float64)
    moments = np.asarray(moments, dtype=np.float64)
    U = design.column_basis
    n = U.shape[0]
    p = moments.shape[0] - 1
    lags = np.abs(np.subtract.outer(np.arange(n), np.arange(n)))
    mu = moments @ rho                                              # (p + 1, n_models)
    bias = np.empty((p, rho.shape[1]))
    cov = np.empty((rho.shape[1], p, p))
    for b in range(rho.shape[1]):
        V = rho[lags, b]
        VU = V @ U
        W = VU - 0.5 * U @ (U.T @ VU)
        S = V - W @ U.T - U @ W.T
        rows = [_shift_sum(S, j) for j in range(p + 1)]             # D_j S
        C = np.empty((p + 1, p + 1))
        for i in range(p + 1):
            for j in range(i, p + 1):
                C[i, j] = C[j, i] = 2.0 * np.sum(rows[i] * rows[j].T)   # 2 trace(D_i S D_j S)
        m0 = mu[0, b]
        q = mu[1:, b] / m0
        bias[:, b] = -C[1:, 0] / m0 ** 2 + q * C[0, 0] / m0 ** 2
        cov[b] = (C[1:, 1:] - np.outer(q, C[0, 1:]) - np.outer(C[1:, 0], q) + np.outer(q, q) * C[0, 0]) / m0 ** 2
    return bias, cov


# ---------------------------------------------------------------------------
# the estimate
# ---------------------------------------------------------------------------

#: Width (in the lag-1 autocorrelation) of the reference groups of :func:`estimate_autocorrelation`.
REFERENCE_GROUP_WIDTH = 0.05
#: Newton steps (at most) and tolerance of the reference models' fixed point.
_NEWTON_STEPS, _NEWTON_TOLERANCE = 20, 1e-11


@dataclass(frozen=True)
class AutocorrelationEstimate:
    """Bias-corrected residual autocorrelations of a set of voxels.

    Attributes
    ----------
    acf : ndarray, shape (p, n_voxels)
        Estimated noise autocorrelations at lags 1..p of each voxel.
    group : ndarray of int, shape (n_voxels,)
        Reference group of each voxel (index into ``reference``).
    reference : ndarray, shape (p, n_groups)
        The autocorrelations of each group's reference model: the estimate
        from the group's mean lag ratios.
    """

    acf: FloatArray
    group: npt.NDArray[np.int64]
    reference: FloatArray


def _normalise(x: FloatArray) -> FloatArray:
    """``x[1:] / x[0]`` with non-finite results set to 0."""
    with np.errstate(divide="ignore", invalid="ignore"):
        r = x[1:] / x[0]
    r[~np.isfinite(r)] = 0.0
    return r


def _lag_solvers(moments: FloatArray, rho: FloatArray, bias: FloatArray) -> FloatArray:
    """The matrices ``K_g`` that map lag products to ``s (1, rho_1..rho_p)``, one per reference model.

    ``E[a] = s (M_T + t e_0') (1, rho)`` with ``M_T`` the first p + 1 columns
    of the moments and ``t_j = sum_(k > p) M_jk rho_k`` the lags beyond p of
    the reference model ``rho`` (shape (n_scans, n_groups)); the ratio bias
    ``bias`` (shape (p, n_groups)) is removed from ``a_j / a_0`` first.
    """
    p = moments.shape[0] - 1
    tail = moments[:, p + 1:] @ rho[p + 1:]                          # (p + 1, g)
    A = np.broadcast_to(moments[:, :p + 1], (rho.shape[1], p + 1, p + 1)).copy()
    A[:, :, 0] += tail.T
    unbias = np.broadcast_to(np.eye(p + 1), A.shape).copy()
    unbias[:, 1:, 0] = -bias.T
    return np.linalg.solve(A, unbias)


def _reference_map(moments: FloatArray, ref: FloatArray, z: FloatArray, bias: FloatArray) -> FloatArray:
    """Lags 1..p estimated from the mean ratios ``z`` with the lags beyond p of the models ``ref``."""
    K = _lag_solvers(moments, extend_autocorrelation(ref, moments.shape[1]), bias)
    return _normalise(np.einsum("gij,jg->ig", K, z))


def _solve_references(moments: FloatArray, design: DesignFactors,
                      ratios: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Reference models whose expected lag ratios are the groups' mean ratios.

    Parameters
    ----------
    moments : ndarray, shape (p + 1, n_scans)
    design : DesignFactors
    ratios : ndarray, shape (p, n_groups)
        Mean ``a_j / a_0`` of each group.

    Returns
    -------
    reference : ndarray, shape (p, n_groups)
        Lags 1..p of each reference model.
    rho : ndarray, shape (n_scans, n_groups)
        Every lag of each reference model.
    bias : ndarray, shape (p, n_groups)
        Ratio bias of each reference model.
    covariance : ndarray, shape (n_groups, p, p)
        Covariance of the lag ratios under each reference model.

    Notes
    -----
    The lags beyond p follow from lags 1..p (:func:`extend_autocorrelation`),
    which follow from the ratios through :func:`_lag_solvers`: a fixed point
    ``r = F(r)``, solved by Newton's method with the Jacobian of ``F - I``
    from forward differences (all groups and perturbations in one call).
    The ratio bias changes the solution by about ``1 / n`` and itself changes
    with the solution by a further ``1 / n``, so it is computed once, at the
    solution without it, and the fixed point is solved again with it.
    """
    p, g = ratios.shape
    n = moments.shape[1]
    z = np.vstack([np.ones(g), ratios])                              # (p + 1, g)
    ref = _normalise(np.linalg.solve(moments[:, :p + 1], z))
    bias = np.zeros((p, g))
    h = 1e-6
    cov = np.zeros((g, p, p))
    for with_bias in (False, True):
        if with_bias:
            bias, cov = compute_ratio_moments(design, moments, extend_autocorrelation(ref, n))
        zz = np.repeat(z, p + 1, axis=1)
        bb = np.repeat(bias, p + 1, axis=1)
        for _ in range(_NEWTON_STEPS):
            trial = np.repeat(ref, p + 1, axis=1)                    # columns: group-major, perturbation-minor
            for i in range(p):
                trial[i, np.arange(g) * (p + 1) + i + 1] += h
            out = _reference_map(moments, trial, zz, bb) - trial     # F(r) - r at r and r + h e_i
            f = out[:, ::p + 1]                                      # (p, g)
            J = np.stack([(out[:, i + 1::p + 1] - f) / h for i in range(p)], axis=2)   # (p, g, p)
            step = np.linalg.solve(np.moveaxis(J, 1, 0), -f.T[:, :, None])[:, :, 0].T
            ref = ref + step
            if float(np.max(np.abs(step), initial=0.0)) < _NEWTON_TOLERANCE:
                break
    rho = extend_autocorrelation(ref, n)
    return ref, rho, bias, cov


def _curvature_bias(K: FloatArray, z: FloatArray, cov: FloatArray) -> FloatArray:
    """Second-order bias ``0.5 sum_ij H_lij cov_ij`` of ``g(q) = (K (1, q))_(1:) / (K (1, q))_0``, shape (p, g).

    ``z = (1, q)`` (shape (p + 1, g)) is where the Hessian ``H`` is taken: with ``u = K z``,
    ``d2 g_l / dq_i dq_j = -(K_li K_0j + K_lj K_0i) / u_0^2 + 2 u_l K_0i K_0j / u_0^3``.
    """
    u = np.einsum("gij,jg->ig", K, z)                                  # (p + 1, g)
    k0 = K[:, 0, 1:]                                                   # (g, p): K_0i
    kl = K[:, 1:, 1:]                                                  # (g, p, p): K_li
    first = -2.0 * np.einsum("gli,gj,gij->lg", kl, k0, cov) / u[0] ** 2
    second = 2.0 * u[1:] * np.einsum("gi,gj,gij->g", k0, k0, cov) / u[0] ** 3
    return 0.5 * (first + second)


def truncated_autocorrelation(lag_products: npt.NDArray[np.floating], moments: npt.NDArray[np.floating],
                              max_lag: int | None = None) -> FloatArray:
    """Worsley's truncated correction: lags 1..max_lag (default p) of the solution of ``a = s M_T (1, rho)``.

    Returns shape (max_lag, n_voxels). A first pass only (it ignores the lags beyond p and the ratio
    bias); the fit uses its lag 1 to choose reference groups.
    """
    if max_lag is None:
        max_lag = moments.shape[0] - 1
    a = np.asarray(lag_products, dtype=np.float64)
    p = moments.shape[0] - 1
    # element-wise products (apply_group_matrices), not a LAPACK solve over the voxels: a BLAS kernel
    # can round a column differently with the array's length and alignment
    truncated = np.linalg.inv(np.asarray(moments, dtype=np.float64)[:, :p + 1])[None, :max_lag + 1]
    return _normalise(apply_group_matrices(truncated, np.zeros(a.shape[1], dtype=np.int64), a))


def estimate_autocorrelation(lag_products: npt.NDArray[np.floating], design: DesignFactors,
                             moments: npt.NDArray[np.floating], classes: npt.NDArray[np.integer] | None = None,
                             reference_key: npt.NDArray[np.floating] | None = None) -> AutocorrelationEstimate:
    """Noise autocorrelations at lags 1..p of each voxel, corrected for the design and the ratio bias.

    Parameters
    ----------
    lag_products : ndarray, shape (p + 1, n_voxels)
        Residual lag products ``a_0..a_p`` (:func:`compute_lag_products`).
    design : DesignFactors
    moments : ndarray, shape (p + 1, n_scans)
        :func:`compute_lag_moments` of the same design and order.
    classes : ndarray of int, shape (n_voxels,), optional
        Tissue class of each voxel (integers in 0..999); reference models are
        never shared across classes.
    reference_key : ndarray, shape (n_voxels,), optional
        A lag-1 autocorrelation of each voxel that varies little with the
        voxel's own noise (the fit step passes the truncated estimate averaged
        over cubes of 12 mm, ``glmsteps.fitting.estimate_noise``); voxels share a reference only
        when their keys agree to within ``REFERENCE_GROUP_WIDTH``. Without it
        each class has one reference.

    Returns
    -------
    AutocorrelationEstimate

    Notes
    -----
    Per voxel the estimate solves ``a - a_0 (0, b) = s (M_T + t e_0') (1, rho)``
    for ``s`` and ``rho_1..rho_p``: equation (1) of the module docstring with
    every lag kept, where the lags beyond p (``t``) and the ratio bias ``b``
    (:func:`compute_ratio_moments`) are those of a reference model, then
    removes the second-order bias of that rational function of the ratios
    ``a_j / a_0`` (:func:`_curvature_bias`). These terms are small (of order
    ``rank / n`` and ``1 / n``) and change slowly with the autocorrelations, so
    a reference is shared by the voxels of a group. A group's reference is the
    model whose expected lag ratios are the group's mean ratios (a fixed
    point, :func:`_solve_references`). Groups must not be formed from the
    voxels' own noisy estimates: selecting voxels by their own estimate and
    then correcting them with the group's model biases the estimates at the
    higher lags, hence ``reference_key``. A voxel's estimate
    depends only on its own lag products and its group's reference, and group
    means are sums over whole groups, so the result does not depend on how the
    voxels were split into chunks.
    """
    a = np.asarray(lag_products, dtype=np.float64)
    moments = np.asarray(moments, dtype=np.float64)
    v = a.shape[1]
    key = np.zeros(v, dtype=np.int64)
    if reference_key is not None:
        rk = np.clip(np.asarray(reference_key, dtype=np.float64), -MAX_ABS_RHO, MAX_ABS_RHO)
        key = np.round(rk / REFERENCE_GROUP_WIDTH).astype(np.int64) + 100
    if classes is not None:
        key = key + np.asarray(classes, dtype=np.int64) * 1000
    _, group = np.unique(key, return_inverse=True)
    group = group.reshape(-1).astype(np.int64)
    counts = np.bincount(group).astype(np.float64)
    scale = np.divide(1.0, a[0], out=np.zeros(v), where=a[0] > 0)
    mean_ratios = np.stack([np.bincount(group, weights=a[j] * scale, minlength=counts.size)
                            for j in range(1, a.shape[0])]) / counts
    reference, rho, bias, cov = _solve_references(moments, design, mean_ratios)
    K = _lag_solvers(moments, rho, bias)
    # (K (1, q))_(1:) / (K (1, q))_0 is not linear in q: remove its curvature bias at the group's ratios
    curvature = _curvature_bias(K, np.vstack([np.ones(counts.size), mean_ratios]), cov)
    x = apply_group_matrices(K, group, a)
    acf = _normalise(x)
    del x
    acf -= curvature[:, group]
    return AutocorrelationEstimate(acf=acf, group=group, reference=reference)


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
        Requested order, 1..MAX_AR_ORDER.

    Returns
    -------
    int
        ``q`` in 1..order (1 if even AR(1) does not fit: AR(1) is always tried).

    Notes
    -----
    An AR(q) model *fits* a design when (a) the residual degrees of freedom
    are at least ``MIN_DOF_PER_AR_COEFFICIENT`` (10) per coefficient,
    ``n - rank(X) >= 10 q`` (common practice for autoregressive estimates), and
    (b) Worsley's matrix ``M_jk``, ``j, k = 0..q``, can be inverted reliably:
    its reciprocal condition number is at least ``1e-8``.
    """
    best = 1
    top = min(order, MAX_AR_ORDER)
    moments = compute_lag_moments(design, top)
    for q in range(1, top + 1):
        if design.dof < MIN_DOF_PER_AR_COEFFICIENT * q:
            break
        if 1.0 / np.linalg.cond(moments[:q + 1, :q + 1]) < MIN_BIAS_MATRIX_RCOND:
            break
        best = q
    return best
