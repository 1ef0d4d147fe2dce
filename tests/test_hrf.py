"""Tests of glmsteps.hrf against scipy.stats.gamma and published HRF shapes."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from glmsteps import hrf
from glmsteps.errors import ConfigError


def reference_double_gamma(t_s: np.ndarray, peak_dispersion_s: float = 1.0) -> np.ndarray:
    """Canonical double gamma written with scipy.stats.gamma.

    # reference: Friston et al. (1998) NeuroImage 7:30-40, two-gamma HRF with
    # delays 6 s and 16 s, unit dispersions, ratio 1/6 (from memory)
    """
    return (stats.gamma.pdf(t_s, 6.0 / peak_dispersion_s, scale=peak_dispersion_s)
            - stats.gamma.pdf(t_s, 16.0, scale=1.0) / 6.0)


def reference_glover(t_s: np.ndarray) -> np.ndarray:
    """Glover (1999) eq. 3 with his motor values, each term written as a peak-normalised gamma pdf.

    # reference: Glover (1999) NeuroImage 9:416-429, n1=6, t1=0.9, n2=12, t2=0.9, a2=0.35 (from memory);
    # t^n exp(-t/tau) is proportional to the gamma pdf of shape n+1 and scale tau
    """
    g1 = stats.gamma.pdf(t_s, 7.0, scale=0.9) / stats.gamma.pdf(6 * 0.9, 7.0, scale=0.9)
    g2 = stats.gamma.pdf(t_s, 13.0, scale=0.9) / stats.gamma.pdf(12 * 0.9, 13.0, scale=0.9)
    return g1 - 0.35 * g2


def test_canonical_peak_and_undershoot_times() -> None:
    kernels, labels = hrf.hrf_basis("double_gamma", 0.1)
    t = np.arange(kernels.shape[0]) * 0.1
    assert labels == ["main"]
    # common practice: the canonical response peaks about 5 s after the impulse and its undershoot is
    # deepest about 15 s after it (Friston et al. 1998; Glover 1999). The mode of gamma(6, 1) is exactly
    # (6 - 1) * 1 = 5 s (reference: gamma mode formula); the undershoot's small negative slope moves it
    # by less than one grid step.
    assert abs(t[np.argmax(kernels[:, 0])] - 5.0) <= 0.1 + 1e-9
    # The undershoot gamma(16, 1) has its mode at 15 s; the still-decaying positive lobe shifts the
    # minimum of the difference later by under a second.
    assert 15.0 <= t[np.argmin(kernels[:, 0])] <= 16.0


def test_glover_peak_time() -> None:
    kernels, _ = hrf.hrf_basis("glover_1999", 0.1)
    t = np.arange(kernels.shape[0]) * 0.1
    # reference: Glover (1999): the response term peaks at n1 * t1 = 5.4 s (from memory); the undershoot
    # term's rising edge pulls the maximum earlier by a little
    assert 5.0 <= t[np.argmax(kernels[:, 0])] <= 5.4 + 1e-9


@pytest.mark.parametrize("dt_s", [0.1, 0.05, 0.01])
def test_kernels_match_scipy_gamma_pdf(dt_s: float) -> None:
    t = np.arange(int(round(32.0 / dt_s))) * dt_s
    ref = reference_double_gamma(t)
    scale = 1.0 / (ref.sum() * dt_s)  # unit-integral normalisation of the sampled kernel (documented choice)
    kernels, labels = hrf.hrf_basis("double_gamma_latency_width", dt_s)
    assert labels == ["main", "latency", "width"]
    assert kernels.shape == (t.size, 3)
    np.testing.assert_allclose(kernels[:, 0], ref * scale, rtol=1e-10, atol=1e-13)
    # temporal derivative: finite difference w.r.t. onset with a 0.1 s delay
    delay = hrf.LATENCY_STEP_S
    ref_derivative = (reference_double_gamma(t - delay) - ref) * scale / delay
    np.testing.assert_allclose(kernels[:, 1], ref_derivative, rtol=1e-9, atol=1e-12)
    # dispersion derivative: finite difference w.r.t. the response dispersion (mean delay kept at 6 s)
    step = hrf.WIDTH_STEP_S
    ref_dispersion = (ref - reference_double_gamma(t, 1.0 + step)) * scale / step
    np.testing.assert_allclose(kernels[:, 2], ref_dispersion, rtol=1e-9, atol=1e-12)
    glover, glabels = hrf.hrf_basis("glover_1999", dt_s)
    g = reference_glover(t)
    assert glabels == ["main"]
    np.testing.assert_allclose(glover[:, 0], g / (g.sum() * dt_s), rtol=1e-10, atol=1e-13)


def test_temporal_derivative_is_finite_difference_of_the_kernel() -> None:
    # With dt equal to the derivative delay, shifting the sampled kernel by one sample is h(t - delay).
    dt_s = hrf.LATENCY_STEP_S
    kernels, _ = hrf.hrf_basis("double_gamma_latency", dt_s)
    main = kernels[:, 0]
    shifted = np.concatenate([[0.0], main[:-1]])
    np.testing.assert_allclose(kernels[:, 1], (shifted - main) / dt_s, rtol=1e-9, atol=1e-12)
    # It approximates minus the analytic time derivative at the midpoint t - delay/2:
    # reference: d/dt gamma.pdf(t; a, 1) = gamma.pdf(t; a, 1) * ((a - 1) / t - 1) (calculus).
    # A central difference has error <= delay^2 / 24 * max|third derivative|, estimated on a fine grid.
    t = np.arange(main.size) * dt_s
    scale = 1.0 / (reference_double_gamma(t).sum() * dt_s)

    def analytic(tt: np.ndarray) -> np.ndarray:
        return scale * (stats.gamma.pdf(tt, 6.0) * (5.0 / tt - 1.0)
                        - stats.gamma.pdf(tt, 16.0) * (15.0 / tt - 1.0) / 6.0)

    fine = np.arange(0.05, 32.0, 0.001)
    third = np.abs(np.diff(analytic(fine), 2)).max() / 0.001 ** 2
    mid = t[1:] - dt_s / 2
    assert np.max(np.abs(-kernels[1:, 1] - analytic(mid))) <= dt_s ** 2 / 24 * third * 1.01


def test_main_kernel_has_unit_integral() -> None:
    for dt_s in (0.1, 0.02):
        kernels, _ = hrf.hrf_basis("double_gamma", dt_s)
        assert kernels[:, 0].sum() * dt_s == pytest.approx(1.0, abs=1e-12)
        # reference: scipy.integrate.quad of the continuous kernel over the 32 s window; the sampled
        # Riemann sum equals it up to O(dt^2) because h(0) = 0 and h(32 s) is ~1e-6 of the peak.
        t = np.arange(kernels.shape[0]) * dt_s
        continuous, _ = integrate.quad(reference_double_gamma, 0.0, 32.0, limit=200)
        assert reference_double_gamma(t).sum() * dt_s == pytest.approx(continuous, rel=1e-4)
        # The full double gamma integrates to 1 - 1/6 (two densities); the 32 s window keeps nearly all of it.
        assert continuous == pytest.approx(5.0 / 6.0, rel=1e-3)


def test_derivative_kernels_integrate_to_about_zero() -> None:
    kernels, _ = hrf.hrf_basis("double_gamma_latency_width", 0.1)
    # reference: the integral of a shifted density, or of a density of another dispersion, equals the
    # original's, so the finite differences integrate to ~0 up to the mass beyond the window.
    assert abs(kernels[:, 1].sum() * 0.1) < 1e-3
    assert abs(kernels[:, 2].sum() * 0.1) < 1e-3


def test_fir_basis_is_disjoint_boxcars() -> None:
    kernels, labels = hrf.hrf_basis("fir", 0.1, fir_bins=5, fir_bin_width_s=2.0)
    assert labels == ["fir00", "fir01", "fir02", "fir03", "fir04"]
    assert kernels.shape == (100, 5)
    # common practice: bin k covers delays [k w, (k + 1) w) with height 1, bins do not overlap
    np.testing.assert_array_equal(kernels.sum(axis=1), np.ones(100))
    t = np.arange(100) * 0.1
    for k in range(5):
        inside = (t >= 2.0 * k - 1e-9) & (t < 2.0 * (k + 1) - 1e-9)
        np.testing.assert_array_equal(kernels[:, k], inside.astype(float))


def test_invalid_basis_settings() -> None:
    with pytest.raises(ConfigError, match="unknown response model"):
        hrf.hrf_basis("triple_gamma", 0.1)  # type: ignore[arg-type]
    with pytest.raises(ConfigError, match="fir_bins"):
        hrf.hrf_basis("fir", 0.1, fir_bins=0, fir_bin_width_s=2.0)
    with pytest.raises(ConfigError, match="fir_bin_width_s"):
        hrf.hrf_basis("fir", 0.1, fir_bins=3, fir_bin_width_s=0.01)
    with pytest.raises(ConfigError, match="time step"):
        hrf.kernel_time_grid(-0.1)


def test_gamma_density_matches_scipy() -> None:
    t = np.linspace(-1.0, 40.0, 500)
    for shape, scale in ((6.0, 1.0), (16.0, 1.0), (7.0, 0.9), (2.5, 3.0)):
        # reference: scipy.stats.gamma.pdf
        np.testing.assert_allclose(hrf.gamma_density(t, shape, scale), stats.gamma.pdf(t, shape, scale=scale),
                                   rtol=1e-11, atol=1e-300)
