"""QC numbers of the study report: temporal SNR, AR innovation ratios, motion summary, the outlier rule."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
import scipy.stats
from numpy.testing import assert_allclose

from glmsteps import estimation as est
from glmsteps import fitting
from glmsteps.settings import FitSettings
from glmsteps.report import qc

FIT_PARAMS = {"scaling": "percent", "grand_mean_value": 100.0, "autocorrelation": "ols", "ar_order": 1,
              "ar_smoothing_fwhm_mm": 0.0, "ar_bin_width": 0.01}


def _design(n: int) -> tuple[np.ndarray, list[str]]:
    t = np.arange(n)
    task = ((t // 10) % 2).astype(float)
    X = np.column_stack([task, np.cos(np.pi * (t + 0.5) / n), np.cos(2 * np.pi * (t + 0.5) / n), np.ones(n)])
    return X, ["interest", "drift", "drift", "intercept"]


def _fit(Y: np.ndarray, X: np.ndarray, roles: list[str], **params) -> tuple[fitting.VoxelFit, np.ndarray, np.ndarray]:
    """Fit Y as the fit job does (its scale factors and its chunked voxel loop)."""
    settings = FitSettings.from_params({**FIT_PARAMS, **params})
    design = est.prepare_design(X, roles)
    mean = Y.mean(axis=0)
    factors = est.compute_scale_factors(mean, settings.scaling, settings.grand_mean_value)
    columns = np.arange(Y.shape[1])
    order = 1 if settings.autocorrelation != "arp" else est.check_ar_order(design, settings.ar_order)
    noise = fitting.NoiseSettings(autocorrelation=settings.autocorrelation, order=order,
                                  smoothing_fwhm_mm=0.0, bin_width=settings.ar_bin_width)
    grid = fitting.VoxelGrid(shape=(Y.shape[1], 1, 1), flat_index=columns.astype(np.int64),
                             voxel_size_mm=np.ones(3))
    vf = fitting.fit_voxels(Y.astype(np.float32), columns, factors, design, noise, 64, grid)
    return vf, mean, factors


@pytest.mark.parametrize("scaling", ["percent", "grand_mean", "none"])
def test_tsnr_of_an_ols_fit_matches_a_direct_numpy_computation(scaling):
    """tSNR from the stored fit quantities = temporal mean / SD of the OLS residuals of the raw signal."""
    rng = np.random.default_rng(11)
    n, v = 80, 40
    X, roles = _design(n)
    level = rng.uniform(400.0, 1600.0, v)                    # raw intensity differs per voxel
    Y = level + X[:, :3] @ rng.normal(0.0, 8.0, (3, v)) + rng.normal(0.0, 1.0, (n, v)) * rng.uniform(5, 30, v)
    vf, mean, factors = _fit(Y, X, roles, scaling=scaling, autocorrelation="ols")
    got = qc.temporal_snr(mean, vf.residual_variance, qc.scale_factors(mean, scaling, 100.0),
                          qc.innovation_ratio("ols", bin_index=vf.bin))
    # reference: numpy.linalg.lstsq residuals of the raw signal, SD with n - rank degrees of freedom
    beta, *_ = np.linalg.lstsq(X, Y, rcond=None)
    resid = Y - X @ beta
    sd = np.sqrt((resid ** 2).sum(axis=0) / (n - np.linalg.matrix_rank(X)))
    # residual variance is stored as float32: relative error ~ 1e-7, so rtol 1e-5 is ample
    assert_allclose(got, Y.mean(axis=0) / sd, rtol=1e-5)
    assert_allclose(qc.scale_factors(mean, scaling, 100.0), factors)


def test_tsnr_of_an_ar1_fit_uses_the_marginal_noise_sd():
    """AR(1): the whitened residual variance is the innovation variance; dividing by 1 - rho^2 recovers
    the noise SD the simulation used (truth: sigma_u / sqrt(1 - rho^2))."""
    rng = np.random.default_rng(5)
    n, v, rho, sigma_u, level = 800, 400, 0.5, 6.0, 1000.0
    X, roles = _design(n)
    noise = scipy.signal.lfilter([1.0], [1.0, -rho], rng.normal(0.0, sigma_u, (n + 200, v)), axis=0)[200:]
    Y = level + 10.0 * X[:, :1] + noise
    vf, mean, factors = _fit(Y, X, roles, autocorrelation="ar1")
    ratio = qc.innovation_ratio("ar1", vf.ar_coef, vf.bin_rho, vf.bin)
    tsnr = qc.temporal_snr(mean, vf.residual_variance, factors, ratio)
    sd_est = mean / tsnr
    truth = sigma_u / np.sqrt(1.0 - rho ** 2)
    r = sd_est / truth
    # tolerance: 4 Monte-Carlo standard errors of the mean ratio over the voxels (estimated from the voxels)
    tol = 4.0 * r.std(ddof=1) / np.sqrt(v)
    assert abs(r.mean() - 1.0) < tol, (r.mean(), tol)
    # without the conversion the SD is the innovation SD: sqrt(1 - rho^2) = 0.87 of the truth, far outside
    naive = (mean / qc.temporal_snr(mean, vf.residual_variance, factors, 1.0)) / truth
    assert abs(naive.mean() - 1.0) > 10 * tol


def test_arp_innovation_ratio_matches_the_process_variance():
    """g = var(u) / var(y) of AR(p) processes: 1 / gamma_0 for unit innovation variance."""
    from statsmodels.tsa.arima_process import ArmaProcess

    phis = np.array([[0.5, -0.2, 0.0], [0.3, 0.2, 0.1], [-0.4, 0.1, 0.05], [0.0, 0.0, 0.0]])
    got = qc.innovation_ratio("arp", phis)
    # reference: statsmodels 0.14 ArmaProcess.acovf (autocovariance of the ARMA process, sigma2 = 1)
    expected = [1.0 / ArmaProcess(ar=np.r_[1.0, -phi], ma=[1.0]).acovf(1)[0] for phi in phis]
    assert_allclose(got, expected, rtol=1e-10)


def test_ar1_innovation_ratio_uses_the_bin_coefficient():
    bin_rho = np.array([-0.2, 0.1, 0.45])
    got = qc.innovation_ratio("ar1", np.zeros((4, 1)), bin_rho, np.array([2, 0, 1, 2]))
    # reference: Prais & Winsten (1954): var(u) = (1 - rho^2) var(y) for a stationary AR(1)
    assert_allclose(got, 1.0 - bin_rho[[2, 0, 1, 2]] ** 2)


def test_reflection_coefficients_invert_levinson_durbin():
    """Step-down recursion: the reflection coefficients of the Yule-Walker solution of an autocorrelation
    sequence are its partial autocorrelations (statsmodels pacf_yw reference)."""
    from statsmodels.tsa.stattools import pacf_yw

    rng = np.random.default_rng(2)
    x = scipy.signal.lfilter([1.0], [1.0, -0.6, 0.25], rng.standard_normal(5000))
    acf = np.array([np.dot(x[:-k] - x.mean(), x[k:] - x.mean()) / np.dot(x - x.mean(), x - x.mean())
                    for k in (1, 2, 3)])
    phi, err, _ = est.levinson_durbin(acf[:, None])
    kappa = qc.reflection_coefficients(phi.T)[0]
    # reference: statsmodels pacf_yw with method "mle" uses the same biased autocovariances
    assert_allclose(kappa, pacf_yw(x, nlags=3, method="mle")[1:], rtol=1e-8, atol=1e-12)
    assert_allclose(qc.innovation_ratio("arp", phi.T), err, rtol=1e-12)


def test_run_summary_numbers():
    m = np.array([100.0, 200.0, 300.0])
    s = qc.summarise_run_signal(m, np.array([10.0, np.nan, 30.0]), np.linspace(-0.1, 0.3, 3))
    assert s.mean_signal == pytest.approx(200.0)
    assert s.tsnr_median == pytest.approx(20.0)   # NaN left out
    # reference: numpy.percentile (linear interpolation)
    assert_allclose(s.ar_quantiles, np.percentile([-0.1, 0.1, 0.3], qc.AR_QUANTILES_PERCENT))
    assert qc.motion_summary([0.1, np.nan, 0.5]) == {"mean": pytest.approx(0.3), "max": 0.5}


# ---------------------------------------------------------------- the outlier rule
def _table():
    """A made-up QC table: two sites with 6 runs, one site with 3 (compared with the whole study)."""
    values = np.array([50.0, 52.0, 49.0, 51.0, 50.5, 80.0,       # site a: one high run
                       30.0, 31.0, 29.5, 30.5, 12.0, 30.2,       # site b: one low run
                       45.0, 44.0, 70.0])                        # site c: too small, judged against everyone
    sites = ["a"] * 6 + ["b"] * 6 + ["c"] * 3
    return values, sites


def test_robust_z_uses_the_scaled_mad_of_each_site():
    values, sites = _table()
    z = qc.robust_z(values, sites, min_group_size=5)
    sites_arr = np.array(sites)
    for site in ("a", "b"):
        x = values[sites_arr == site]
        # reference: scipy.stats.median_abs_deviation(scale="normal") (Rousseeuw & Croux 1993)
        expected = (x - np.median(x)) / scipy.stats.median_abs_deviation(x, scale="normal")
        assert_allclose(z[sites_arr == site], expected, rtol=1e-12)
    expected_c = (values[12:] - np.median(values)) / scipy.stats.median_abs_deviation(values, scale="normal")
    assert_allclose(z[12:], expected_c, rtol=1e-12)


def test_outlier_flags_on_a_made_up_table():
    values, sites = _table()
    flags = qc.flag_outliers(values, sites, k=3.0, min_group_size=5)
    # by hand: site a median 50.75, MAD 1.0 -> scale 1.483; 80 is 19.7 scales out, 49 is 1.18
    # site b median 30.1, MAD 0.5 -> 0.741; 12 is 24.4 scales out, 31 is 1.21
    # site c against the study: median 45, MAD 14 -> 20.8; 70 is 1.20 scales out (not flagged at 3)
    assert np.flatnonzero(flags).tolist() == [5, 10]
    # a stricter rule flags more, a looser one fewer
    assert np.flatnonzero(qc.flag_outliers(values, sites, k=1.1)).tolist() == [2, 5, 7, 10, 14]
    assert not qc.flag_outliers(values, sites, k=40.0).any()


def test_outlier_rule_when_most_values_are_equal_and_nan():
    values = np.array([0.0, 0.0, 0.0, 0.0, 0.0, 0.1, np.nan])
    sites = ["s"] * 7
    # MAD is 0: the scale is sqrt(pi/2) x mean absolute deviation (E|X - mu| = sigma sqrt(2/pi) for normal
    # X; from memory) = 1.2533 x 0.1 / 6
    z = qc.robust_z(values, sites, 5)
    assert z[5] == pytest.approx(0.1 / (np.sqrt(np.pi / 2) * 0.1 / 6))
    assert np.isnan(z[6])
    assert qc.flag_outliers(values, sites).tolist() == [False] * 5 + [True, False]
    # all equal: nothing flagged, z = 0
    assert qc.robust_z([2.0] * 6, ["s"] * 6).tolist() == [0.0] * 6


def test_scaled_mad_estimates_the_sd_of_normal_data():
    """1.4826 x MAD is consistent for sigma: on 200,000 N(0, 2^2) draws it is within 4 Monte-Carlo SEs of 2."""
    rng = np.random.default_rng(8)
    x = rng.normal(0.0, 2.0, 200_000)
    _, scale = qc.robust_scale(x)
    # SE of the scaled MAD for normal data: 1.1664 sigma / sqrt(n) (Rousseeuw & Croux 1993, efficiency 37 %)
    assert abs(scale - 2.0) < 4 * 1.1664 * 2.0 / np.sqrt(x.size)


def test_only_the_bad_side_is_flagged():
    values, sites = _table()
    assert np.flatnonzero(qc.flag_outliers(values, sites, direction="high")).tolist() == [5]
    assert np.flatnonzero(qc.flag_outliers(values, sites, direction="low")).tolist() == [10]


def test_relative_spread_floor():
    """Very similar runs (spread 0.1 %) are not flagged for a 0.5 % difference once the SD is at least 5 %
    of the median; a 30 % difference still is."""
    values = np.array([100.0, 100.1, 99.9, 100.05, 99.95, 100.02, 99.5, 70.0])
    sites = ["s"] * 8
    assert np.flatnonzero(qc.flag_outliers(values, sites)).tolist() == [6, 7]
    assert np.flatnonzero(qc.flag_outliers(values, sites, min_relative_spread=0.05)).tolist() == [7]
    # the floor is min_relative_spread x |median|: 70 lies (70 - 100.01) / 5.0005 = -6.0 SDs away
    z = qc.robust_z(values, sites, min_relative_spread=0.05)
    assert z[7] == pytest.approx((70.0 - np.median(values)) / (0.05 * np.median(values)))


def test_describe_outlier_rule_states_the_numbers():
    text = qc.describe_outlier_rule(3.0, 5, 0.05)
    assert "more than 3 robust standard deviations" in text and "fewer than 5 runs" in text
    assert "1.4826" in text and "at least 5% of the median" in text and "low temporal SNR" in text
