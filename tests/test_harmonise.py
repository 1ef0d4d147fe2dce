"""Tests of the empirical-Bayes site harmonisation (Johnson, Li & Rabinovic 2007)."""

from __future__ import annotations

import numpy as np
import pytest

from glmsteps.errors import GroupError
from glmsteps.harmonise import harmonise_site_effects, harmonise_variances


def hand_harmonise(Y: np.ndarray, sites: list[str], tol: float = 1e-10) -> np.ndarray:
    """Scalar-loop version of the paper's steps, no covariates.

    reference: Johnson, Li & Rabinovic (2007) Biostatistics 8:118, sec. 3.1-3.2 and eqs. 2.2, 3.1-3.3.
    """
    n, n_vox = Y.shape
    levels = sorted(set(sites))
    members = {s: [j for j in range(n) if sites[j] == s] for s in levels}
    Z = np.zeros_like(Y)
    alpha = np.zeros(n_vox)
    sigma = np.zeros(n_vox)
    for g in range(n_vox):
        site_mean = {s: sum(Y[j, g] for j in members[s]) / len(members[s]) for s in levels}
        alpha[g] = sum(len(members[s]) / n * site_mean[s] for s in levels)
        sigma[g] = np.sqrt(sum((Y[j, g] - site_mean[sites[j]]) ** 2 for j in range(n)) / n)
        for j in range(n):
            Z[j, g] = (Y[j, g] - alpha[g]) / sigma[g]
    out = np.zeros_like(Y)
    for s in levels:
        rows = members[s]
        ni = len(rows)
        g_hat = np.array([np.mean(Z[rows, g]) for g in range(n_vox)])
        d_hat = np.array([np.var(Z[rows, g], ddof=1) for g in range(n_vox)])
        g_bar, t2 = np.mean(g_hat), np.var(g_hat, ddof=1)
        m, s2 = np.mean(d_hat), np.var(d_hat, ddof=1)
        lam, theta = (2 * s2 + m**2) / s2, (m * s2 + m**3) / s2
        g_star, d_star = g_hat.copy(), d_hat.copy()
        for _ in range(10000):
            g_new = (ni * t2 * g_hat + d_star * g_bar) / (ni * t2 + d_star)
            d_new = np.array([(theta + 0.5 * np.sum((Z[rows, g] - g_new[g]) ** 2)) / (ni / 2 + lam - 1)
                              for g in range(n_vox)])
            done = np.max(np.abs(g_new - g_star)) < tol and np.max(np.abs(d_new - d_star)) < tol
            g_star, d_star = g_new, d_new
            if done:
                break
        for j in rows:
            for g in range(n_vox):
                out[j, g] = sigma[g] / np.sqrt(d_star[g]) * (Z[j, g] - g_star[g]) + alpha[g]
    return out


def test_tiny_worked_example_matches_hand_computation() -> None:
    Y = np.array([[1.0, 2.0, 0.0, 5.0],
                  [2.0, 3.0, 1.0, 4.0],
                  [4.0, 2.5, 0.5, 6.0],
                  [6.0, 8.0, 3.0, 9.0],
                  [5.0, 9.0, 2.0, 7.0],
                  [9.0, 6.0, 4.0, 12.0]])
    sites = ["a", "a", "a", "b", "b", "b"]
    result = harmonise_site_effects(Y, sites, tol=1e-12)
    np.testing.assert_allclose(result.adjusted, hand_harmonise(Y, sites), rtol=1e-7, atol=1e-8)
    # hand arithmetic: the overall mean of each voxel is kept (alpha = grand mean, no covariates)
    np.testing.assert_allclose(result.adjusted.mean(axis=0), Y.mean(axis=0), atol=0.5)


def test_site_shift_and_scale_vanish_and_covariate_survives() -> None:
    rng = np.random.default_rng(21)
    n_per, n_vox = 20, 2000
    sites = np.repeat(["a", "b", "c"], n_per)
    n = sites.size
    age = rng.uniform(20, 70, n)
    slope = 0.04
    shift = {"a": 0.0, "b": 1.5, "c": -1.0}
    scale = {"a": 1.0, "b": 2.0, "c": 0.5}
    Y = np.empty((n, n_vox))
    for s in shift:
        rows = sites == s
        site_loc = shift[s] + rng.normal(0, 0.2, n_vox)
        Y[rows] = site_loc + scale[s] * rng.normal(size=(rows.sum(), n_vox))
    Y += 1.0 + slope * (age - age.mean())[:, None]
    result = harmonise_site_effects(Y, sites, covariates=age[:, None])
    adj = result.adjusted
    resid = adj - slope * (age - age.mean())[:, None]
    # Location: each site's mean over subjects (per voxel) minus the all-subject mean averages to ~0
    # over independent voxels; bound at 4 standard errors over voxels (common practice).
    for s in shift:
        diff = resid[sites == s].mean(axis=0) - resid.mean(axis=0)
        assert abs(diff.mean()) < 4 * diff.std(ddof=1) / np.sqrt(n_vox)
        before = (Y - slope * (age - age.mean())[:, None])[sites == s].mean(axis=0) - Y.mean(axis=0)
        assert abs(before.mean()) > 10 * before.std(ddof=1) / np.sqrt(n_vox)  # the shift was there
    # Scale: the within-site variances, 4x and 1/4x those of site a before, become close to equal.
    # The empirical-Bayes shrinkage of delta^2 leaves a bias of order 1 / n_site, so no exact sampling
    # interval applies; we require at least 90 % of the log variance ratio to be removed (common practice).
    var = {s: resid[sites == s].var(axis=0, ddof=1).mean() for s in shift}
    for s in ("b", "c"):
        before_ratio = np.log(scale[s] ** 2 / scale["a"] ** 2)
        assert abs(np.log(var[s] / var["a"])) < 0.1 * abs(before_ratio), (s, var)
    # The age effect survives: per-voxel OLS slope on age and site averages to the planted slope
    # within 4 standard errors over voxels.
    design = np.column_stack([np.ones(n), age, sites == "b", sites == "c"]).astype(float)
    slopes = np.linalg.lstsq(design, adj, rcond=None)[0][1]
    assert abs(slopes.mean() - slope) < 4 * slopes.std(ddof=1) / np.sqrt(n_vox)


def test_harmonisation_input_errors() -> None:
    Y = np.zeros((5, 10))
    with pytest.raises(GroupError, match="fewer than 2"):
        harmonise_site_effects(Y, ["a", "a", "b", "b", "c"])
    with pytest.raises(GroupError, match="one site"):
        harmonise_site_effects(Y, ["a"] * 5)


def _two_site_gain_study(seed: int = 41, n_per: int = 12, n_vox: int = 400, gain: float = 1.7):
    """Two sites whose scanners differ in gain by 1.7x: effects AND their first-level variances scale."""
    rng = np.random.default_rng(seed)
    sites = np.repeat(["a", "b"], n_per)
    scale = np.where(sites == "b", gain, 1.0)[:, None]
    v_true = rng.uniform(0.1, 0.4, size=(2 * n_per, n_vox))          # first-level variance in common units
    effect = 0.5 + rng.normal(0, np.sqrt(0.3), size=(2 * n_per, n_vox)) + rng.normal(size=v_true.shape) * np.sqrt(v_true)
    return sites, scale * effect, scale**2 * v_true


def test_variances_are_rescaled_with_the_effects() -> None:
    sites, Y, V = _two_site_gain_study()
    result = harmonise_site_effects(Y, sites)
    V_star = harmonise_variances(V, result)
    # reference: the harmonisation is an affine map of each site's effects at a voxel (Johnson et al. 2007,
    # eq. 3.3), so its slope is (y*_i - y*_j) / (y_i - y_j) for two subjects i, j of one site; the variance
    # of y* is the variance of y times that slope squared.
    for site in ("a", "b"):
        i, j = np.flatnonzero(sites == site)[:2]
        slope = (result.adjusted[i] - result.adjusted[j]) / (Y[i] - Y[j])
        np.testing.assert_allclose(V_star[i], V[i] * slope**2, rtol=1e-9)
        np.testing.assert_allclose(result.effect_scale[i], slope, rtol=1e-9)


def test_mixed_model_on_harmonised_effects_matches_statsmodels_wls() -> None:
    import statsmodels.api as sm
    from statsmodels.stats.meta_analysis import combine_effects

    from glmsteps import group as gm

    sites, Y, V = _two_site_gain_study()
    result = harmonise_site_effects(Y, sites)
    V_star = harmonise_variances(V, result)
    fit = gm.fit_mixed_contrast(np.ones((Y.shape[0], 1)), result.adjusted, V_star, np.array([1.0]), "mixed_dl")
    raw = gm.fit_mixed_contrast(np.ones((Y.shape[0], 1)), result.adjusted, V, np.array([1.0]), "mixed_dl")
    # the slope of each site's affine harmonisation map, from two of its subjects (see the test above)
    slope = np.empty_like(Y)
    for site in ("a", "b"):
        rows = np.flatnonzero(sites == site)
        slope[rows] = (result.adjusted[rows[0]] - result.adjusted[rows[1]]) / (Y[rows[0]] - Y[rows[1]])
    worse = 0
    for v in range(0, Y.shape[1], 40):
        ref_v = V[:, v] * slope[:, v] ** 2
        # reference: statsmodels 0.15 combine_effects (DerSimonian-Laird tau^2, HKSJ variance) and WLS with
        # weights 1 / (rescaled variance + tau^2), on the harmonised effects
        # (statsmodels leaves a negative DL estimate; DerSimonian & Laird 1986, eq. 8 truncate it at 0)
        tau2 = max(0.0, combine_effects(result.adjusted[:, v], ref_v, method_re="dl").tau2)
        assert fit.between_variance[v] == pytest.approx(tau2, rel=1e-9, abs=1e-12)
        wls = sm.WLS(result.adjusted[:, v], np.ones(Y.shape[0]), weights=1.0 / (ref_v + tau2)).fit()
        assert fit.effect[v] == pytest.approx(wls.params[0], rel=1e-9)
        assert fit.variance[v] == pytest.approx(wls.bse[0] ** 2, rel=1e-9)
        worse += not np.isclose(raw.variance[v], wls.bse[0] ** 2, rtol=1e-3)
    # with the variances left in raw units (the defect) the weights, and so the variances, differ
    assert worse == 10
