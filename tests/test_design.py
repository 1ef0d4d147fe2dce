"""Tests of glmsteps.design against scipy, numpy and statsmodels computations written here."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.fft
import scipy.linalg
import statsmodels.api as sm
from scipy import stats

from glmsteps import contrasts
from glmsteps import design as gd
from glmsteps.errors import DesignError, GlmstepsWarning
from glmsteps.hrf import hrf_basis

# --------------------------------------------------------------------------- reference HRF


def ref_hrf(u: np.ndarray) -> np.ndarray:
    """Canonical double gamma, scipy densities (reference: Friston et al. 1998, from memory)."""
    return stats.gamma.pdf(u, 6.0) - stats.gamma.pdf(u, 16.0) / 6.0


def ref_hrf_integral(u: np.ndarray) -> np.ndarray:
    """Integral of ref_hrf from 0 to u, via scipy gamma CDFs (reference: scipy.stats.gamma.cdf)."""
    return stats.gamma.cdf(u, 6.0) - stats.gamma.cdf(u, 16.0) / 6.0


def kernel_scale(dt_s: float) -> float:
    """The documented unit-integral normalisation of the sampled kernel on [0, 32) s."""
    t = np.arange(int(round(32.0 / dt_s))) * dt_s
    return 1.0 / (ref_hrf(t).sum() * dt_s)


def derivative_bounds() -> tuple[float, float]:
    """max |h'| and max |h''| of the normalised kernel, from differences on a 1 ms grid."""
    fine = np.arange(0.0, 32.0, 0.001)
    h = ref_hrf(fine) * kernel_scale(0.1)
    return float(np.abs(np.diff(h)).max() / 1e-3), float(np.abs(np.diff(h, 2)).max() / 1e-6)


# --------------------------------------------------------------------------- frame times


def test_frame_times_formula() -> None:
    # common practice: volume j is referenced at (j + volume_time_fraction) * TR
    np.testing.assert_allclose(gd.frame_times(4, 2.0, 0.5), [1.0, 3.0, 5.0, 7.0])
    np.testing.assert_allclose(gd.frame_times(3, 1.5, 0.0, first_volume=2), [3.0, 4.5, 6.0])
    with pytest.raises(DesignError, match="volume_time_fraction"):
        gd.frame_times(4, 2.0, 1.5)
    with pytest.raises(DesignError, match="repetition_time_s"):
        gd.frame_times(4, 0.0)
    with pytest.raises(DesignError, match="n_volumes"):
        gd.frame_times(0, 2.0)


# --------------------------------------------------------------------------- convolution


def test_impulse_matches_continuous_hrf() -> None:
    dt = 0.1
    kernel, _ = hrf_basis("double_gamma", dt)
    ft = gd.frame_times(60, 0.7, 0.5)
    onset = 3.37
    got = gd.convolve_events([onset], [0.0], [1.0], ft, kernel[:, 0], dt)
    u = ft - onset
    inside = (u >= 0) & (u <= 31.8)
    expected = np.where(u > 0, ref_hrf(np.clip(u, 0, None)), 0.0) * kernel_scale(dt)
    _, h2 = derivative_bounds()
    # reference: scipy.stats.gamma.pdf; error bound: linear split of the impulse (dt^2/8 max|h''|) plus
    # linear interpolation at the frame times (dt^2/8 max|h''|)
    np.testing.assert_allclose(got[inside], expected[inside], rtol=0, atol=dt ** 2 / 4 * h2)
    assert np.all(got[u < 0] == 0.0)


def test_block_matches_gamma_cdf_and_reaches_plateau() -> None:
    dt = 0.1
    kernel, _ = hrf_basis("double_gamma", dt)
    ft = gd.frame_times(120, 0.5, 0.5)
    onset, duration = 4.03, 45.0
    got = gd.convolve_events([onset], [duration], [1.0], ft, kernel[:, 0], dt)
    scale = kernel_scale(dt)
    u = ft - onset
    expected = (ref_hrf_integral(np.clip(u, 0, 31.95)) - ref_hrf_integral(np.clip(u - duration, 0, 31.95))) * scale
    h1, _ = derivative_bounds()
    # reference: integral of the HRF over the block = difference of scipy gamma CDFs; error bound:
    # cell quadrature and interpolation each at most dt^2/8 max|r''|, with |r''| <= 2 max|h'| for a block
    np.testing.assert_allclose(got, expected, rtol=0, atol=dt ** 2 / 2 * h1)
    # a block longer than 30 s reaches a plateau equal to the HRF's integral (1 by the normalisation)
    plateau = (u >= 32.2) & (u <= duration - 0.2)
    assert plateau.sum() >= 20
    np.testing.assert_allclose(got[plateau], kernel[:, 0].sum() * dt, rtol=0, atol=1e-12)
    np.testing.assert_allclose(got[plateau], 1.0, rtol=0, atol=1e-12)


def test_refining_dt_does_not_change_the_regressor() -> None:
    ft = gd.frame_times(150, 2.0, 0.5)
    rng = np.random.default_rng(3)
    onsets = np.sort(rng.uniform(0.0, 280.0, 12))
    durations = np.where(np.arange(12) % 3 == 0, rng.uniform(0.5, 20.0, 12), 0.0)
    amplitudes = rng.uniform(0.5, 2.0, 12)
    out = {}
    for dt in (0.1, 0.001):
        kernel, _ = hrf_basis("double_gamma", dt)
        out[dt] = gd.convolve_events(onsets, durations, amplitudes, ft, kernel[:, 0], dt)
    h1, h2 = derivative_bounds()
    n_imp = int(np.sum(durations == 0))
    # error bound at each dt: sum over events of |a| times the per-event second-order bounds used above
    bound = sum((dt ** 2) * (np.abs(amplitudes[durations == 0]).sum() * h2 / 4
                             + np.abs(amplitudes[durations > 0]).sum() * h1 / 2) for dt in (0.1, 0.001))
    assert n_imp > 0
    np.testing.assert_allclose(out[0.1], out[0.001], rtol=0, atol=bound)
    assert np.abs(out[0.1]).max() > 100 * bound


def test_linearity_in_amplitude_and_events() -> None:
    kernel, _ = hrf_basis("double_gamma", 0.1)
    ft = gd.frame_times(80, 1.0)
    a = gd.convolve_events([5.0], [0.0], [2.0], ft, kernel, 0.1)
    b = gd.convolve_events([21.3], [4.0], [-1.0], ft, kernel, 0.1)
    both = gd.convolve_events([5.0, 21.3], [0.0, 4.0], [2.0, -1.0], ft, kernel, 0.1)
    np.testing.assert_allclose(both, a + b, atol=1e-12)  # reference: convolution is linear


def test_convolution_rejects_coarse_grid_and_bad_events() -> None:
    kernel, _ = hrf_basis("double_gamma", 0.1)
    ft = gd.frame_times(10, 2.0)
    with pytest.raises(DesignError, match="<= 0.1"):
        gd.convolve_events([1.0], [0.0], [1.0], ft, kernel, 0.2)
    with pytest.raises(DesignError, match="negative"):
        gd.convolve_events([1.0], [-1.0], [1.0], ft, kernel, 0.1)
    with pytest.raises(DesignError, match="not a finite"):
        gd.convolve_events([np.nan], [0.0], [1.0], ft, kernel, 0.1)


# --------------------------------------------------------------------------- drifts


@pytest.mark.parametrize(("n", "tr", "cutoff"), [(100, 2.0, 128.0), (64, 2.0, 128.0), (300, 0.8, 100.0), (40, 3.0, 1e4)])
def test_cosine_drift_equals_dct_ii(n: int, tr: float, cutoff: float) -> None:
    ft = gd.frame_times(n, tr)
    drift = gd.cosine_drift(ft, cutoff)
    # column count: every k >= 1 whose DCT-II frequency k / (2 n TR) lies strictly below 1 / cutoff
    expected_k = 0
    while (expected_k + 1) / (2 * n * tr) < 1.0 / cutoff and expected_k + 1 < n:
        expected_k += 1
    assert drift.shape == (n, expected_k)
    # reference: scipy.fft.dct of the identity, norm="ortho": row k is DCT-II basis vector k
    basis = scipy.fft.dct(np.eye(n), norm="ortho", axis=0)
    for k in range(1, expected_k + 1):
        sign = np.sign(drift[:, k - 1] @ basis[k])
        np.testing.assert_allclose(sign * drift[:, k - 1], basis[k], atol=1e-12)


def test_cosine_drift_boundary_period_is_excluded() -> None:
    # 64 volumes of 2 s: 2 n TR / cutoff = 2 exactly, so k = 2 has period 128 s = cutoff and is dropped
    assert gd.cosine_drift(gd.frame_times(64, 2.0), 128.0).shape[1] == 1
    assert gd.cosine_drift_count(64, 2.0, 127.9) == 2


def test_legendre_drift_orthogonal_and_spans_legendre_polynomials() -> None:
    ft = gd.frame_times(57, 1.3)
    order = 4
    drift = gd.legendre_drift(ft, order)
    assert drift.shape == (57, order)
    np.testing.assert_allclose(drift.T @ drift, np.eye(order), atol=1e-12)  # orthonormal on the grid
    np.testing.assert_allclose(drift.T @ np.ones(57), 0.0, atol=1e-12)  # orthogonal to the constant
    # reference: numpy.polynomial.legendre.legvander; span{1, col_1..col_d} = span{P_0..P_d} for every d
    x = np.linspace(-1.0, 1.0, 57)
    vander = np.polynomial.legendre.legvander(x, order)
    for d in range(1, order + 1):
        basis = np.column_stack([np.ones(57), drift[:, :d]])
        coef, *_ = np.linalg.lstsq(basis, vander[:, d], rcond=None)
        np.testing.assert_allclose(basis @ coef, vander[:, d], atol=1e-10)
        assert drift[:, d - 1] @ vander[:, d] > 0
    with pytest.raises(DesignError, match="legendre_order"):
        gd.legendre_drift(ft, 0)


# --------------------------------------------------------------------------- assembly


def small_events() -> pd.DataFrame:
    return pd.DataFrame({
        "onset": [4.0, 20.0, 36.5, 52.0, 70.0, 88.0, 104.0, 121.0, 140.0, 160.0],
        "duration": [1.0, 0.0, 1.0, 0.0, 1.0, 0.0, 1.0, 0.0, 1.0, 0.0],
        "condition": ["go", "stop", "go", "stop", "go", "stop", "go", "stop", "go", "stop"],
        "rt": [0.4, 0.0, 0.7, 0.0, 0.5, 0.0, 0.9, 0.0, 0.6, 0.0],
    })


def test_build_design_columns_roles_and_absent_condition() -> None:
    ft = gd.frame_times(90, 2.0)
    rng = np.random.default_rng(0)
    confounds = pd.DataFrame({"motion_x": rng.normal(size=90), "spike_0012": np.eye(90)[12],
                              "spike_0001": np.zeros(90)})
    with pytest.warns(GlmstepsWarning) as caught:
        design = gd.build_design(small_events(), ft, hrf="double_gamma_latency", confounds=confounds,
                                 conditions=["stop", "go", "rest"], modulators={"go": ["rt"]},
                                 drift_basis="cosine", cutoff_s=100.0)
    texts = " | ".join(str(w.message) for w in caught)
    assert "'rest'" in texts and "spike_0001" in texts
    n_drift = gd.cosine_drift_count(90, 2.0, 100.0)
    assert design.names == ("stop", "stop__latency", "go", "go__latency", "go__x_rt", "rest",
                            "rest__latency", "motion_x", "spike_0012",
                            *[f"slow_{k:02d}" for k in range(1, n_drift + 1)], "intercept")
    assert design.roles[:9] == ("interest",) * 4 + ("modulator",) + ("interest",) * 2 + ("confound", "spike")
    assert design.roles[-1] == "intercept" and set(design.roles[9:-1]) == {"drift"}
    assert design.basis[:7] == ("main", "latency", "main", "latency", "modulator", "main", "latency")
    assert design.conditions[:7] == ("stop", "stop", "go", "go", "go", "rest", "rest")
    assert design.X.dtype == np.float64 and design.X.shape == (90, len(design.names))
    np.testing.assert_array_equal(design.X[:, 5:7], 0.0)
    np.testing.assert_array_equal(design.X[:, -1], 1.0)
    np.testing.assert_array_equal(design.frame_times_s, ft)


def test_default_condition_order_is_sorted_and_extra_conditions_warn() -> None:
    ft = gd.frame_times(90, 2.0)
    ev = small_events()
    ev.loc[ev.index[:2], "condition"] = ["zeta", "alpha"]
    design = gd.build_design(ev, ft, drift_basis="none")
    assert [n for n, r in zip(design.names, design.roles) if r == "interest"] == ["alpha", "go", "stop", "zeta"]
    with pytest.warns(GlmstepsWarning, match="not modelled"):
        gd.build_design(ev, ft, drift_basis="none", conditions=["go", "stop"])


def test_modulator_is_mean_centred_within_condition() -> None:
    ft = gd.frame_times(90, 2.0)
    ev = small_events()
    design = gd.build_design(ev, ft, modulators={"go": ["rt"]}, drift_basis="none")
    kernel, _ = hrf_basis("double_gamma", 0.1)
    go = ev[ev.condition == "go"]
    # reference: Buchel et al. (1996) mean-centred parametric regressor = sum_e (m_e - mean m) r_e,
    # with r_e each event's own convolved response (numpy mean, events convolved one at a time)
    centred = go.rt.to_numpy() - np.mean(go.rt.to_numpy())
    singles = [gd.convolve_events([o], [d], [1.0], ft, kernel[:, 0], 0.1) for o, d in zip(go.onset, go.duration)]
    expected = np.sum([c * s for c, s in zip(centred, singles)], axis=0)
    np.testing.assert_allclose(design.X[:, design.names.index("go__x_rt")], expected, atol=1e-12)
    np.testing.assert_allclose(design.X[:, design.names.index("go")], np.sum(singles, axis=0), atol=1e-12)


def test_build_design_user_errors() -> None:
    ft = gd.frame_times(90, 2.0)
    with pytest.raises(DesignError, match="fir"):
        gd.build_design(small_events(), ft, hrf="fir", fir_bins=4, fir_bin_width_s=2.0, modulators={"go": ["rt"]})
    with pytest.raises(DesignError, match="no modulator column 'speed'"):
        gd.build_design(small_events(), ft, modulators={"go": ["speed"]})
    bad = pd.DataFrame({"motion_x": np.r_[np.nan, np.zeros(89)]})
    with pytest.raises(DesignError, match="motion_x"):
        gd.build_design(small_events(), ft, confounds=bad)
    with pytest.raises(DesignError, match="rows"):
        gd.build_design(small_events(), ft, confounds=pd.DataFrame({"a": np.zeros(10)}))
    with pytest.raises(DesignError, match="'go' occurs twice"):
        gd.build_design(small_events(), ft, confounds=pd.DataFrame({"go": np.arange(90.0)}))


def test_fir_design_columns() -> None:
    ft = gd.frame_times(90, 2.0)
    design = gd.build_design(small_events(), ft, hrf="fir", fir_bins=3, fir_bin_width_s=4.0, drift_basis="none")
    assert design.names[:6] == ("go__fir00", "go__fir01", "go__fir02", "stop__fir00", "stop__fir01", "stop__fir02")
    assert design.basis[:3] == ("fir00", "fir01", "fir02")
    # an impulse at 20 s: the 0-4 s bin is 1 at frames 21 s and 23 s (common practice FIR definition)
    stop0 = design.X[:, design.names.index("stop__fir00")]
    np.testing.assert_allclose(stop0[[10, 11]], [1.0, 1.0], atol=1e-9)


# --------------------------------------------------------------------------- diagnostics


def diagnostic_design() -> gd.Design:
    ft = gd.frame_times(90, 2.0)
    rng = np.random.default_rng(11)
    confounds = pd.DataFrame({"motion_x": rng.normal(size=90), "motion_y": rng.normal(size=90)})
    return gd.build_design(small_events(), ft, hrf="double_gamma_latency", confounds=confounds,
                           modulators={"go": ["rt"]}, drift_basis="cosine", cutoff_s=128.0)


def test_vif_matches_statsmodels_ols() -> None:
    design = diagnostic_design()
    diag = gd.design_diagnostics(design)
    X = design.X
    interest = [j for j, r in enumerate(design.roles) if r in ("interest", "modulator")]
    assert set(diag["vif"]) == {design.names[j] for j in interest}
    for j in interest:
        others = np.delete(X, j, axis=1)  # includes the intercept column, so R^2 is centred
        fit = sm.OLS(X[:, j], others).fit()  # reference: statsmodels OLS
        assert diag["vif"][design.names[j]] == pytest.approx(1.0 / (1.0 - fit.rsquared), rel=1e-8)


def test_rank_condition_number_and_correlation() -> None:
    design = diagnostic_design()
    diag = gd.design_diagnostics(design)
    X = design.X
    # reference: numpy.linalg.matrix_rank and numpy.linalg.cond of the unit-length-column X
    assert diag["rank"] == np.linalg.matrix_rank(X) == X.shape[1]
    assert diag["condition_number"] == pytest.approx(np.linalg.cond(X / np.linalg.norm(X, axis=0)), rel=1e-10)
    corr = np.array([[np.nan if v is None else v for v in row] for row in diag["correlation"]["values"]])
    varying = [j for j in range(X.shape[1]) if np.ptp(X[:, j]) > 0]
    ref = np.corrcoef(X[:, varying], rowvar=False)  # reference: numpy.corrcoef
    np.testing.assert_allclose(corr[np.ix_(varying, varying)], ref, atol=1e-12)
    assert np.all(np.isnan(corr[:, design.names.index("intercept")]))
    assert diag["correlation"]["names"] == list(design.names)


def test_absent_condition_is_reported_not_an_error() -> None:
    ft = gd.frame_times(90, 2.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", GlmstepsWarning)
        design = gd.build_design(small_events(), ft, conditions=["go", "stop", "rest"])
    diag = gd.design_diagnostics(design)
    assert diag["non_estimable"] == ["rest"]
    assert diag["vif"]["rest"] is None
    assert diag["rank"] == design.X.shape[1] - 1


def test_rank_deficient_design_names_the_collinear_columns() -> None:
    ft = gd.frame_times(90, 2.0)
    base = gd.build_design(small_events(), ft, drift_basis="none")
    go = base.X[:, base.names.index("go")]
    rng = np.random.default_rng(5)
    confounds = pd.DataFrame({"motion_x": rng.normal(size=90), "shifted_go": 2.0 * go + 3.0})
    design = gd.build_design(small_events(), ft, drift_basis="none", confounds=confounds)
    # reference: the null space of X (scipy.linalg.null_space) involves go, shifted_go and intercept only
    null = scipy.linalg.null_space(design.X / np.linalg.norm(design.X, axis=0))
    assert null.shape[1] == 1
    involved = {n for n, v in zip(design.names, null[:, 0]) if abs(v) > 1e-6}
    assert involved == {"go", "shifted_go", "intercept"}
    with pytest.raises(DesignError) as info:
        gd.design_diagnostics(design)
    message = str(info.value)
    assert "\n" not in message
    assert "go, shifted_go, intercept" in message and "stop" not in message and "motion_x" not in message
    diag = gd.design_diagnostics(design, allow_rank_deficient=True)
    assert diag["collinear"] == ["go", "shifted_go", "intercept"]
    assert diag["rank"] == design.X.shape[1] - 1 and diag["condition_number"] is None


def test_contrast_efficiency_on_a_modulated_design_against_lstsq_and_statsmodels() -> None:
    design = diagnostic_design()
    X = design.X
    c = np.zeros(X.shape[1])
    c[design.names.index("go")], c[design.names.index("stop")] = 1.0, -1.0
    # reference: the minimum-norm solution a of X' a = c (numpy lstsq) has |a|^2 = c' pinv(X'X) c
    a, *_ = np.linalg.lstsq(X.T, c, rcond=None)
    assert contrasts.efficiency(X, c) == pytest.approx(1.0 / (a @ a), rel=1e-9)
    # reference: statsmodels OLS normalized_cov_params = pinv(X'X)
    cov = sm.OLS(np.zeros(X.shape[0]), X).fit().normalized_cov_params
    C = np.vstack([c, np.eye(X.shape[1])[design.names.index("go__x_rt")]])
    assert contrasts.efficiency(X, C) == pytest.approx(1.0 / np.trace(C @ cov @ C.T), rel=1e-9)


def test_is_estimable_against_null_space() -> None:
    rng = np.random.default_rng(2)
    x1, x2 = rng.normal(size=(2, 40))
    X = np.column_stack([x1, x2, x1 + x2, np.ones(40)])
    null = scipy.linalg.null_space(X)  # reference: c is estimable iff c is orthogonal to null(X) (Searle 1971)
    for c in ([1.0, 0.0, 1.0, 0.0], [1.0, 1.0, 2.0, 5.0], [1.0, 0.0, 0.0, 0.0], [0.0, 1.0, -1.0, 0.0],
              [1.0, -1.0, 0.0, 0.0]):
        expected = bool(np.all(np.abs(np.asarray(c) @ null) < 1e-9))
        assert contrasts.estimability(X, np.atleast_2d(c)).estimable is expected
    assert contrasts.estimability(X, np.array([[1.0, 0.0, 1.0, 0.0], [0.0, 0.0, 0.0, 1.0]])).estimable
    assert not contrasts.estimability(X, np.array([[1.0, 0.0, 1.0, 0.0], [1.0, 0.0, 0.0, 0.0]])).estimable
