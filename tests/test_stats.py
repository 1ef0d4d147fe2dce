"""Tests of glmsteps.stats: t/F to p and z in log space."""

from __future__ import annotations

import mpmath
import numpy as np
import pytest
from scipy import stats as sps

from glmsteps import stats

mpmath.mp.dps = 50


def _mp_t_logsf(t: float, nu: float) -> mpmath.mpf:
    # reference: Abramowitz & Stegun (1964) eq. 26.7.1 / 26.5.27, evaluated with mpmath at 50 digits
    x = mpmath.mpf(nu) / (nu + mpmath.mpf(t) ** 2)
    upper = mpmath.betainc(mpmath.mpf(nu) / 2, mpmath.mpf(1) / 2, 0, x, regularized=True) / 2
    return mpmath.log(upper) if t >= 0 else mpmath.log(1 - upper)


def _mp_f_logsf(f: float, d1: float, d2: float) -> mpmath.mpf:
    # reference: Abramowitz & Stegun (1964) eq. 26.6.2 / 26.5.27, evaluated with mpmath at 50 digits
    x = mpmath.mpf(d2) / (d2 + mpmath.mpf(d1) * f)
    return mpmath.log(mpmath.betainc(mpmath.mpf(d2) / 2, mpmath.mpf(d1) / 2, 0, x, regularized=True))


def _mp_z_from_logsf(log_sf: mpmath.mpf) -> mpmath.mpf:
    # reference: the normal upper tail Phi(-z) = erfc(z / sqrt 2) / 2, solved in mpmath
    def g(z):
        return mpmath.log(mpmath.erfc(z / mpmath.sqrt(2)) / 2) - log_sf
    guess = mpmath.sqrt(-2 * log_sf) if log_sf < -1 else mpmath.mpf(0.5)
    return mpmath.findroot(g, guess)


T_CASES = [(t, nu) for nu in (10, 37, 100, 1000) for t in (0.5, 3.0, 8.0, 20.0, 35.0, 50.0)]
F_CASES = [(f, d1, d2) for d1 in (1, 3, 7) for d2 in (10, 100, 1000) for f in (0.3, 4.0, 60.0, 500.0, 2000.0)]


@pytest.mark.parametrize("t, nu", T_CASES)
def test_t_far_tail_matches_mpmath(t, nu):
    ref = _mp_t_logsf(t, nu)
    got = stats.t_logsf(t, nu)
    assert np.isfinite(got)
    assert abs(got - float(ref)) <= 1e-10 * max(1.0, abs(float(ref)))
    z_ref = float(_mp_z_from_logsf(ref))
    z = stats.t_to_z(t, nu)
    assert np.isfinite(z)
    assert abs(z - z_ref) <= 1e-9 * max(1.0, abs(z_ref))
    # odd symmetry of z, negative tail equal to positive tail of -t
    assert stats.t_to_z(-t, nu) == pytest.approx(-z, rel=1e-12)
    assert stats.t_logpvalue(-t, nu, "negative") == pytest.approx(got, rel=1e-12)


@pytest.mark.parametrize("f, d1, d2", F_CASES)
def test_f_far_tail_matches_mpmath(f, d1, d2):
    ref = _mp_f_logsf(f, d1, d2)
    got = stats.f_logpvalue(f, d1, d2)
    assert np.isfinite(got)
    assert abs(got - float(ref)) <= 1e-10 * max(1.0, abs(float(ref)))
    z_ref = float(_mp_z_from_logsf(ref))
    z = stats.f_to_z(f, d1, d2)
    assert np.isfinite(z)
    assert abs(z - z_ref) <= 1e-9 * max(1.0, abs(z_ref))


def test_t_to_z_matches_scipy_where_scipy_is_accurate():
    rng = np.random.default_rng(0)
    t = rng.uniform(-12, 12, size=500)
    nu = rng.uniform(10, 1000, size=500)
    # reference: scipy.stats norm.isf(t.sf) (accurate while sf is far from 0 and 1)
    ref = np.where(t >= 0, sps.norm.isf(sps.t.sf(np.abs(t), nu)), -sps.norm.isf(sps.t.sf(np.abs(t), nu)))
    np.testing.assert_allclose(stats.t_to_z(t, nu), ref, rtol=1e-8, atol=1e-8)


def test_f_to_z_matches_scipy_where_scipy_is_accurate():
    rng = np.random.default_rng(1)
    f = rng.uniform(0.01, 30, size=300)
    d1 = rng.integers(1, 8, size=300)
    d2 = rng.uniform(10, 1000, size=300)
    # reference: scipy.stats norm.isf(f.sf)
    np.testing.assert_allclose(stats.f_to_z(f, d1, d2), sps.norm.isf(sps.f.sf(f, d1, d2)), rtol=1e-8, atol=1e-8)


def test_pvalues_match_scipy_for_each_tail():
    rng = np.random.default_rng(2)
    t = rng.normal(scale=3, size=200)
    nu = 25.0
    # reference: scipy.stats.t sf/cdf
    np.testing.assert_allclose(stats.t_pvalue(t, nu, "positive"), sps.t.sf(t, nu), rtol=1e-10)
    np.testing.assert_allclose(stats.t_pvalue(t, nu, "negative"), sps.t.cdf(t, nu), rtol=1e-10)
    np.testing.assert_allclose(stats.t_pvalue(t, nu, "two-sided"), 2 * sps.t.sf(np.abs(t), nu), rtol=1e-10)
    f = np.abs(t) ** 2
    # reference: scipy.stats.f sf
    np.testing.assert_allclose(stats.f_pvalue(f, 2, nu), sps.f.sf(f, 2, nu), rtol=1e-10)
    # reference: scipy.stats.norm sf
    np.testing.assert_allclose(np.exp(stats.z_logpvalue(t, "two-sided")), 2 * sps.norm.sf(np.abs(t)), rtol=1e-10)


def test_nan_and_invalid_dof_propagate():
    assert np.isnan(stats.t_to_z(np.nan, 10))
    assert np.isnan(stats.t_logsf(2.0, 0.0))
    assert np.isnan(stats.f_to_z(np.nan, 1, 10))
    assert stats.t_to_z(0.0, 10) == 0.0
    with pytest.raises(ValueError):
        stats.t_logpvalue(1.0, 10, "left")


@pytest.mark.parametrize("tail", ["positive", "negative", "two-sided"])
@pytest.mark.parametrize("t, dof", [(0.7, 5.0), (-2.0, 12.0), (9.0, 20.0), (-9.0, 20.0), (60.0, 8.0), (-60.0, 8.0),
                                    (1e30, 20.0), (-1e30, 3.0)])
def test_t_pvalue_of_each_tail_against_mpmath(t, dof, tail):
    # reference: mpmath at 50 digits, P(T > t) = I_{d/(d+t^2)}(d/2, 1/2) / 2 for t > 0 (Abramowitz &
    # Stegun 26.7.1), the lower tail as its complement; two-sided = 2 P(T > |t|)
    x = mpmath.mpf(dof) / (dof + mpmath.mpf(t) ** 2)
    far = mpmath.betainc(mpmath.mpf(dof) / 2, mpmath.mpf(1) / 2, 0, x, regularized=True) / 2   # P(T > |t|)
    upper = far if t > 0 else 1 - far
    ref = {"positive": upper, "negative": 1 - upper, "two-sided": 2 * far}[tail]
    got = stats.t_logpvalue(t, dof, tail)
    assert np.isfinite(got)
    assert abs(got - float(mpmath.log(ref))) <= 1e-9 * max(1.0, abs(float(mpmath.log(ref))))


@pytest.mark.parametrize("tail", ["positive", "negative", "two-sided"])
def test_t_critical_inverts_the_p_value(tail):
    p = np.array([0.05, 1e-3, 1e-8])
    dof = np.array([4.0, 19.0, 120.0])
    c = stats.t_critical(p, dof, tail)
    # reference: scipy.stats.t.isf of the one-sided level (p / 2 for two sides)
    np.testing.assert_allclose(c, sps.t.isf(p / 2 if tail == "two-sided" else p, dof), rtol=1e-12)
    side = -c if tail == "negative" else c
    np.testing.assert_allclose(stats.t_pvalue(side, dof, tail), p, rtol=1e-9)
