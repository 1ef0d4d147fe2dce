"""Tests of glmsteps.estimation against statsmodels, scipy and published formulas."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
import scipy.stats
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy.linalg import solve_toeplitz, toeplitz
from statsmodels.tsa.arima_process import ArmaProcess

from glmsteps import estimation as est
from glmsteps.errors import DesignError, GlmstepsWarning

TR_S = 2.0


def block_design(n: int, spikes: tuple[int, ...] = ()) -> tuple[np.ndarray, list[str]]:
    """A toy-run-like design: 2 block conditions (convolved with a double-gamma), 2 cosine drifts, intercept."""
    t_s = np.arange(n) * TR_S
    a = ((t_s // 20) % 2 == 0).astype(float)          # 20 s on / 20 s off
    b = ((t_s // 30) % 2 == 0).astype(float)          # 30 s on / 30 s off
    lags = np.arange(0, 32, TR_S)
    # double-gamma shape (peak ~5 s, undershoot ~15 s, ratio 1/6)  # common practice
    h = scipy.stats.gamma.pdf(lags, 6) - scipy.stats.gamma.pdf(lags, 16) / 6
    a, b = np.convolve(a, h)[:n], np.convolve(b, h)[:n]
    k = np.arange(1, 3)
    drift = np.cos(np.pi * np.outer(np.arange(n) + 0.5, k) / n)
    X = np.column_stack([a, b, drift, np.ones(n)])
    roles = ["interest", "interest", "drift", "drift", "intercept"]
    for s in spikes:
        col = np.zeros(n)
        col[s] = 1.0
        X = np.column_stack([X, col])
        roles.append("spike")
    return X, roles


def ar1_noise(rng: np.random.Generator, n: int, v: int, rho: float) -> np.ndarray:
    """Stationary AR(1) noise, unit innovations, shape (n, v)."""
    e = rng.standard_normal((n, v))
    e[0] /= np.sqrt(1.0 - rho ** 2)
    return scipy.signal.lfilter([1.0], [1.0, -rho], e, axis=0)


# --------------------------------------------------------------------------- OLS

def test_ols_matches_statsmodels() -> None:
    rng = np.random.default_rng(0)
    X, roles = block_design(120)
    d = est.prepare_design(X, roles)
    Y = 100 + X[:, :2] @ rng.normal(size=(2, 30)) + ar1_noise(rng, 120, 30, 0.3)
    ols = est.fit_ols(d, Y)
    cov = d.pinv @ d.pinv.T
    for i in (0, 7, 29):
        ref = sm.OLS(Y[:, i], X).fit()  # reference: statsmodels OLS
        assert_allclose(ols.beta[:, i], ref.params, rtol=1e-6)
        assert_allclose(ols.residual_variance[i], ref.scale, rtol=1e-6)
        t = ols.beta[:, i] / np.sqrt(ols.residual_variance[i] * np.diag(cov))
        assert_allclose(t, ref.tvalues, rtol=1e-6)
    assert d.dof == 120 - 5


def test_spike_column_must_be_indicator() -> None:
    X, roles = block_design(40, spikes=(5,))
    X[6, -1] = 1.0
    with pytest.raises(DesignError, match="role spike"):
        est.prepare_design(X, roles)


def test_rank_deficient_design_warns() -> None:
    X, roles = block_design(40)
    X = np.column_stack([X, X[:, 0]])
    with pytest.warns(GlmstepsWarning, match="rank 5"):
        d = est.prepare_design(X, roles + ["interest"])
    assert d.rank == 5 and d.dof == 35


# --------------------------------------------------------------------------- AR(1) refit

def test_ar1_refit_matches_statsmodels_gls() -> None:
    rng = np.random.default_rng(1)
    n = 120
    X, roles = block_design(n)
    d = est.prepare_design(X, roles)
    Y = 100 + X[:, :2] @ np.array([[1.0], [0.5]]) + ar1_noise(rng, n, 40, 0.35)
    ols = est.fit_ols(d, Y)
    rho = est.estimate_autocorrelation(est.compute_lag_products(ols.residuals, 1), d,
                                       est.compute_lag_moments(d, 1)).acf[0]
    bin_index, bin_rho = est.assign_bins(rho, 0.01)
    bins = est.prepare_bins(d, bin_rho)
    fit = est.fit_ar1_block(d, Y, ols, bin_index, bins)
    for i in (0, 13, 39):
        r = bin_rho[bin_index[i]]
        ref = sm.GLS(Y[:, i], X, sigma=toeplitz(r ** np.arange(n))).fit()  # reference: statsmodels GLS
        assert_allclose(fit.beta[:, i], ref.params, rtol=1e-6)
        t = fit.beta[:, i] / np.sqrt(fit.residual_variance[i] * np.diag(bins.covariance[bin_index[i]]))
        assert_allclose(t, ref.tvalues, rtol=1e-6)


def test_censored_volumes_are_gaps_in_the_ar1_series() -> None:
    rng = np.random.default_rng(2)
    n, spikes, rho = 100, (0, 31, 32, 77, 99), 0.45
    X, roles = block_design(n, spikes)
    d = est.prepare_design(X, roles)
    Y = 50 + ar1_noise(rng, n, 5, rho)
    Y[31] += 40.0  # an artefact that censoring must remove
    ols = est.fit_ols(d, Y)
    bins = est.prepare_bins(d, np.array([rho]))
    fit = est.fit_ar1_block(d, Y, ols, np.zeros(5, dtype=np.int32), bins)
    keep = np.setdiff1d(np.arange(n), spikes)
    sigma = rho ** np.abs(keep[:, None] - keep[None, :])  # AR(1) correlation at the kept scan times
    p_main = X.shape[1] - len(spikes)
    for i in range(5):
        ref = sm.GLS(Y[keep, i], X[keep, :p_main], sigma=sigma).fit()  # reference: statsmodels GLS, kept volumes
        assert_allclose(fit.beta[:p_main, i], ref.params, rtol=1e-6)
        t = fit.beta[:p_main, i] / np.sqrt(fit.residual_variance[i] * np.diag(bins.covariance[0])[:p_main])
        assert_allclose(t, ref.tvalues, rtol=1e-6)
    # the residual of a censored volume is zero, exactly in OLS and to rounding after the refit
    assert np.all(ols.residuals[list(spikes)] == 0.0)
    assert_allclose((Y - X @ fit.beta)[list(spikes)], 0.0, atol=1e-9)
    assert d.dof == n - len(spikes) - p_main


def test_ar1_sufficient_statistics_equal_explicit_whitening() -> None:
    rng = np.random.default_rng(3)
    X, roles = block_design(80, spikes=(10,))
    d = est.prepare_design(X, roles)
    Y = 10 + ar1_noise(rng, 80, 12, 0.6)
    bin_index = np.repeat(np.arange(3, dtype=np.int32), 4)
    rhos = np.array([-0.2, 0.3, 0.6])
    ols = est.fit_ols(d, Y)
    fast = est.fit_ar1_block(d, Y, ols, bin_index, est.prepare_bins(d, rhos))
    slow = est.fit_arp_summary(d, Y, est.compute_lag_products(ols.residuals, 1), bin_index,
                               est.prepare_bins(d, rhos, rhos[:, None]))
    assert_allclose(fast.beta, slow.beta, rtol=1e-9, atol=1e-9)
    assert_allclose(fast.residual_variance, slow.residual_variance, rtol=1e-9)


# --------------------------------------------------------------------------- bias correction

def test_lag_moments_equal_dense_traces() -> None:
    X, roles = block_design(60, spikes=(7, 30))
    d = est.prepare_design(X, roles)
    M = est.compute_lag_moments(d, 3)
    R = np.eye(60) - X @ np.linalg.pinv(X)

    def D(j: int) -> np.ndarray:
        return np.eye(60) if j == 0 else np.eye(60, k=j) + np.eye(60, k=-j)
    # reference: Worsley et al. (2002) NeuroImage 15:1-15, sec. 3.3 (from memory): M_jk = trace(R D_j R D_k),
    # computed here with dense matrices
    ref = np.array([[np.trace(R @ D(j) @ R @ D(k)) for k in range(60)] for j in range(4)])
    assert_allclose(M, ref, rtol=1e-10, atol=1e-9)
    assert_allclose(M[0, 0], 60 - d.rank, rtol=1e-12)        # trace(R) = n - rank


def test_ratio_bias_equals_dense_second_order_formula() -> None:
    X, roles = block_design(80)
    d = est.prepare_design(X, roles)
    M = est.compute_lag_moments(d, 2)
    rho = ArmaProcess(np.r_[1, -0.5, -0.2], [1]).acf(80)   # reference: statsmodels ArmaProcess.acf
    R = np.eye(80) - X @ np.linalg.pinv(X)
    S = R @ toeplitz(rho) @ R

    def D(j: int) -> np.ndarray:
        return np.eye(80) if j == 0 else np.eye(80, k=j) + np.eye(80, k=-j)
    mu = [np.trace(D(j) @ S) for j in range(3)]
    # reference: delta method for a ratio (Stuart & Ord 1994, sec. 10.5) with the Gaussian quadratic-form
    # moments cov(y'Ay, y'By) = 2 trace(A V B V) (Searle 1971, sec. 2.5), dense
    ref = [-2 * np.trace(D(j) @ S @ S) / mu[0] ** 2 + mu[j] * 2 * np.trace(S @ S) / mu[0] ** 3 for j in (1, 2)]
    assert_allclose(est.compute_ratio_moments(d, M, rho[:, None])[0][:, 0], ref, rtol=1e-10)


@pytest.mark.slow
def test_ratio_bias_matches_monte_carlo() -> None:
    # E[a_j / a_0] = E[a_j] / E[a_0] + ratio bias, to second order; checked on 100,000 AR(2) series
    n, v = 120, 100_000
    X, roles = block_design(n)
    d = est.prepare_design(X, roles)
    phi = np.array([0.5, 0.2])
    rng = np.random.default_rng(21)
    Y = scipy.signal.lfilter([1.0], np.r_[1, -phi], rng.standard_normal((n + 200, v)), axis=0)[200:]
    a = est.compute_lag_products(est.fit_ols(d, Y).residuals, 2)
    q = a[1:] / a[0]
    M = est.compute_lag_moments(d, 2)
    rho = ArmaProcess(np.r_[1, -phi], [1]).acf(n)   # reference: statsmodels ArmaProcess.acf
    first_order = (M @ rho)[1:] / (M @ rho)[0]
    expected = first_order + est.compute_ratio_moments(d, M, rho[:, None])[0][:, 0]
    se = q.std(axis=1) / np.sqrt(v)
    # tolerance: 3 Monte-Carlo standard errors of the mean ratio; without the ratio bias the first-order
    # expectation misses by more than 10 of them
    assert np.all(np.abs(q.mean(axis=1) - expected) < 3 * se)
    assert np.all(np.abs(q.mean(axis=1) - first_order) > 10 * se)


def test_estimate_does_not_depend_on_voxel_order_and_groups_respect_classes() -> None:
    rng = np.random.default_rng(8)
    X, roles = block_design(100)
    d = est.prepare_design(X, roles)
    Y = ar1_noise(rng, 100, 600, 0.4)
    a = est.compute_lag_products(est.fit_ols(d, Y).residuals, 2)
    M = est.compute_lag_moments(d, 2)
    classes = rng.integers(0, 2, 600)
    e = est.estimate_autocorrelation(a, d, M, classes)
    for g in np.unique(e.group):
        assert np.unique(classes[e.group == g]).size == 1
    # the same voxels in another order: each voxel's estimate is unchanged (to rounding: the group means are
    # summed in another order; for a fixed voxel order the fit is bit-identical, tests/test_fitting.py)
    order = rng.permutation(600)
    e2 = est.estimate_autocorrelation(a[:, order], d, M, classes[order])
    assert_allclose(e2.acf, e.acf[:, order], rtol=1e-12, atol=1e-14)


# --------------------------------------------------------------------------- AR(p)

def test_levinson_durbin_matches_toeplitz_solve() -> None:
    acf = np.array([0.5, 0.2, 0.05, -0.02])
    phi, err, used = est.levinson_durbin(acf[:, None])
    r = np.concatenate([[1.0], acf])
    ref = solve_toeplitz(r[:4], r[1:5])  # reference: scipy.linalg.solve_toeplitz (Yule-Walker equations)
    assert_allclose(phi[:, 0], ref, rtol=1e-10)
    assert_allclose(err[0], 1 - ref @ acf, rtol=1e-10)
    assert used[0] == 4


def test_levinson_durbin_stops_at_non_stationary_order() -> None:
    phi, _, used = est.levinson_durbin(np.array([[0.9], [0.2]]))  # r_2 far below r_1^2: |k_2| >= 0.99
    assert used[0] == 1
    assert_allclose(phi[:, 0], [0.9, 0.0])


def test_autocorrelation_of_ar_matches_statsmodels() -> None:
    phi = np.array([0.5, 0.2, -0.1])
    ref = ArmaProcess(np.r_[1, -phi], [1]).acf(10)  # reference: statsmodels ArmaProcess.acf
    assert_allclose(est.autocorrelation_of_ar(phi, 10), ref, rtol=1e-10)


def test_ar2_refit_matches_statsmodels_gls() -> None:
    rng = np.random.default_rng(4)
    n = 150
    X, roles = block_design(n, spikes=(40,))
    d = est.prepare_design(X, roles)
    phi = np.array([0.4, 0.2])
    noise = scipy.signal.lfilter([1.0], np.r_[1, -phi], rng.standard_normal((n + 200, 3)), axis=0)[200:]
    Y = 100 + noise
    acf = est.autocorrelation_of_ar(phi, 3)[1:]
    bins = est.prepare_bins(d, acf[:1], acf[None, :])
    lags = est.compute_lag_products(est.fit_ols(d, Y).residuals, 2)
    fit = est.fit_arp_summary(d, Y, lags, np.zeros(3, dtype=np.int32), bins)
    sigma = toeplitz(est.autocorrelation_of_ar(phi, n))
    for i in range(3):
        ref = sm.GLS(Y[:, i], X, sigma=sigma).fit()  # reference: statsmodels GLS
        assert_allclose(fit.beta[:-1, i], ref.params[:-1], rtol=1e-6)  # the spike coefficient is settled apart
        t = fit.beta[:-1, i] / np.sqrt(fit.residual_variance[i] * np.diag(bins.covariance[0])[:-1])
        assert_allclose(t, ref.tvalues[:-1], rtol=1e-6)


def test_arp_refit_with_censored_scans_at_both_ends_matches_statsmodels_gls() -> None:
    # censored volumes inside the first and last p scans (the corners of W'W), and a bin whose
    # autocorrelations only support a lower order than the bins' (zero-padded, still exact)
    rng = np.random.default_rng(12)
    n = 140
    X, roles = block_design(n, spikes=(1, 70, n - 2))
    d = est.prepare_design(X, roles)
    phi = np.array([0.5, -0.2, 0.1])
    noise = scipy.signal.lfilter([1.0], np.r_[1, -phi], rng.standard_normal((n + 200, 4)), axis=0)[200:]
    Y = 100 + noise
    acf3 = est.autocorrelation_of_ar(phi, 4)[1:]
    # (0.9, 0.2, 0.1) is no AR(2) autocorrelation (reflection coefficient -3.2): that bin is AR(1) 0.9
    bins = est.prepare_bins(d, np.array([acf3[0], 0.9]), np.vstack([acf3, [0.9, 0.2, 0.1]]))
    assert bins.order.tolist() == [3, 1]
    lags = est.compute_lag_products(est.fit_ols(d, Y).residuals, 3)
    bin_index = np.array([0, 0, 1, 1], dtype=np.int32)
    fit = est.fit_arp_summary(d, Y, lags, bin_index, bins)
    keep = X[:, :-3]
    for i in range(4):
        b = bin_index[i]
        model = est.autocorrelation_of_ar(bins.phi[b, :int(bins.order[b])], n)
        ref = sm.GLS(Y[:, i], X, sigma=toeplitz(model)).fit()   # reference: statsmodels GLS
        assert_allclose(fit.beta[:keep.shape[1], i], ref.params[:keep.shape[1]], rtol=1e-7)
        se = np.sqrt(fit.residual_variance[i] * np.diag(bins.covariance[b])[:keep.shape[1]])
        t = fit.beta[:keep.shape[1], i] / se
        assert_allclose(t, ref.tvalues[:keep.shape[1]], rtol=1e-7)


def test_ar_order_fits_design() -> None:
    X, roles = block_design(32)          # rank 5: 27 residual dof -> at most 2 coefficients (10 per coefficient)
    d = est.prepare_design(X, roles)
    assert est.check_ar_order(d, 4) == 2
    assert est.check_ar_order(d, 1) == 1
    X, roles = block_design(200)
    assert est.check_ar_order(est.prepare_design(X, roles), 4) == 4


# --------------------------------------------------------------------------- scaling, smoothing, bins

def test_scale_factors() -> None:
    mean = np.array([200.0, 400.0, 600.0])
    assert_allclose(est.compute_scale_factors(mean, "percent") * mean, 100.0)  # common practice: 100 * y / mean
    gm = est.compute_scale_factors(mean, "grand_mean", 1000.0)
    assert_allclose(np.mean(gm * mean), 1000.0)
    assert_allclose(gm, gm[0])
    assert_allclose(est.compute_scale_factors(mean, "none"), 1.0)


def smooth_grid(vals: np.ndarray, mask: np.ndarray, fwhm_mm: float, voxel_mm: tuple,
                classes: np.ndarray | None = None) -> np.ndarray:
    """est.smooth_voxel_values on the voxels of ``mask``, back on the grid (0 outside)."""
    flat = np.flatnonzero(mask)
    out = np.zeros(mask.shape)
    labels = None if classes is None else classes.ravel()[flat]
    out.flat[flat] = est.smooth_voxel_values(vals.ravel()[flat][None], flat, mask.shape, fwhm_mm, voxel_mm,
                                             labels)[0]
    return out


def test_smoothing_within_mask_keeps_a_constant_at_the_edge() -> None:
    mask = np.zeros((12, 12, 12), dtype=bool)
    mask[3:9, 2:10, 4:8] = True
    out = smooth_grid(np.where(mask, 0.4, -5.0), mask, 6.0, (2.0, 2.0, 3.0))
    # reference: Knutsson & Westin (1993): normalised convolution reproduces a constant signal exactly
    assert_allclose(out[mask], 0.4, rtol=1e-12)


def test_smoothing_interior_equals_gaussian_filter() -> None:
    from scipy.ndimage import gaussian_filter

    rng = np.random.default_rng(5)
    vals = rng.normal(size=(30, 30, 30))
    mask = np.ones(vals.shape, dtype=bool)
    out = smooth_grid(vals, mask, 4.0, (2.0, 2.0, 2.0))
    sigma = 4.0 / np.sqrt(8 * np.log(2)) / 2.0  # FWHM = sqrt(8 ln 2) sigma  # common practice
    ref = gaussian_filter(vals, sigma, mode="constant")  # reference: scipy.ndimage.gaussian_filter
    assert_allclose(out[10:20, 10:20, 10:20], ref[10:20, 10:20, 10:20], rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("fwhm_mm, voxel_mm", [(5.0, (2.0, 2.0, 2.0)), (8.0, (1.5, 2.5, 3.5)), (0.5, (3.0, 3.0, 3.0))])
def test_smoothing_within_classes_equals_normalised_gaussian_filter(fwhm_mm: float, voxel_mm: tuple) -> None:
    from scipy.ndimage import gaussian_filter

    rng = np.random.default_rng(11)
    shape = (17, 13, 9)
    grids = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    mask = sum(g ** 2 for g in grids) < 0.8
    classes = np.where(grids[0] > 0.1, 2, 1)
    vals = rng.normal(size=shape)
    for labels in (None, classes):
        out = smooth_grid(vals, mask, fwhm_mm, voxel_mm, labels)
        # reference: scipy.ndimage.gaussian_filter (zero outside the grid, truncated at 4 sigma), used for
        # normalised convolution G*(m v) / G*m within each class's mask (Knutsson & Westin 1993)
        sigma = fwhm_mm / np.sqrt(8 * np.log(2)) / np.asarray(voxel_mm)
        for c in ([1, 2] if labels is not None else [None]):
            m = mask if c is None else mask & (classes == c)
            num = gaussian_filter(np.where(m, vals, 0.0), sigma, mode="constant")
            den = gaussian_filter(m.astype(float), sigma, mode="constant")
            assert_allclose(out[m], num[m] / den[m], rtol=1e-10, atol=1e-13)


def test_assign_bins() -> None:
    idx, centres = est.assign_bins(np.array([0.004, 0.006, -0.3149, 1.5, 0.3]), 0.01)
    assert_allclose(centres[idx], [0.0, 0.01, -0.31, 0.99, 0.3], atol=1e-12)
    assert np.all(np.diff(centres) > 0)


def test_multiply_columns_is_chunk_independent() -> None:
    rng = np.random.default_rng(6)
    A, B = rng.normal(size=(23, 300)), rng.normal(size=(300, 1003))
    whole = est.multiply_columns(A, B)
    for size in (1, 7, 64, 100):
        parts = np.concatenate([est.multiply_columns(A, B[:, s:s + size]) for s in range(0, 1003, size)], axis=1)
        assert np.array_equal(parts, whole)
        # a gathered chunk (column-major, as fancy indexing returns it) gives the same columns
        gathered = [est.multiply_columns(A, B[:, np.arange(s, min(s + size, 1003))]) for s in range(0, 1003, size)]
        assert np.array_equal(np.concatenate(gathered, axis=1), whole)
    assert_allclose(whole, A @ B, rtol=1e-12)
