"""Tests of glmsteps.combine: fixed effects over runs."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as sps

from glmsteps import combine
from glmsteps.errors import DataError


def test_fixed_effects_equal_inverse_variance_mean_by_hand():
    rng = np.random.default_rng(10)
    e = rng.normal(size=(3, 50))
    v = rng.uniform(0.2, 2.0, size=(3, 50))
    dofs = np.array([100.0, 90.0, 120.0])
    e[1, :5] = np.nan          # run 2 missing at the first 5 voxels
    v[2, 5:8] = np.nan         # run 3 missing at voxels 5..7
    out = combine.fixed_effects(e, v, dofs, "two-sided")
    # reference: inverse-variance weighted mean written independently with numpy (Cochran 1954)
    for i in range(50):
        keep = np.isfinite(e[:, i]) & np.isfinite(v[:, i])
        w = 1.0 / v[keep, i]
        eff = np.sum(w * e[keep, i]) / np.sum(w)
        var = 1.0 / np.sum(w)
        dof = dofs[keep].sum()
        assert out.effect[i] == pytest.approx(eff, rel=1e-12)
        assert out.variance[i] == pytest.approx(var, rel=1e-12)
        assert out.dof[i] == dof
        assert out.n_runs[i] == keep.sum()
        t = eff / np.sqrt(var)
        # reference: scipy.stats.t two-sided p and norm.isf for z
        assert out.p[i] == pytest.approx(2 * sps.t.sf(abs(t), dof), rel=1e-9)
        assert out.z[i] == pytest.approx(np.sign(t) * sps.norm.isf(sps.t.sf(abs(t), dof)), rel=1e-8)


def test_voxel_missing_in_every_run_is_nan():
    e = np.array([[1.0, np.nan], [2.0, np.nan]])
    v = np.array([[1.0, 1.0], [1.0, 1.0]])
    out = combine.fixed_effects(e, v, [10, 10])
    assert out.effect[0] == pytest.approx(1.5)  # equal weights: plain mean
    assert np.isnan(out.effect[1]) and np.isnan(out.t[1]) and out.n_runs[1] == 0


def test_grid_mismatch_is_one_line_error_naming_runs():
    aff = np.eye(4)
    combine.check_same_grid([(4, 4, 4), (4, 4, 4)], [aff, aff.copy()], ["run-1", "run-2"])
    with pytest.raises(DataError) as info:
        combine.check_same_grid([(4, 4, 4), (4, 4, 5)], [aff, aff], ["task-a_run-1", "task-a_run-2"])
    msg = str(info.value)
    assert "\n" not in msg and "task-a_run-1" in msg and "task-a_run-2" in msg
    shifted = aff.copy()
    shifted[0, 3] = 2.0
    with pytest.raises(DataError):
        combine.check_same_grid([(4, 4, 4), (4, 4, 4)], [aff, shifted], ["run-1", "run-2"])


def test_fixed_effects_match_statsmodels_wls_with_known_variances():
    """The inverse-variance mean, its variance and t are WLS of the run effects on an intercept."""
    import statsmodels.api as sm

    rng = np.random.default_rng(21)
    e = rng.normal(0.4, 1.0, size=(4, 30))
    v = rng.uniform(0.1, 3.0, size=(4, 30))
    out = combine.fixed_effects(e, v, [80.0, 80.0, 75.0, 90.0])
    for i in range(30):
        # reference: statsmodels 0.15 WLS with weights 1/v; cov_params(scale=1) because the run
        # variances are known (Hedges & Olkin 1985, ch. 6), not re-estimated from the residuals
        fit = sm.WLS(e[:, i], np.ones((4, 1)), weights=1.0 / v[:, i]).fit()
        var = float(fit.cov_params(scale=1.0)[0, 0])
        assert out.effect[i] == pytest.approx(fit.params[0], rel=1e-12)
        assert out.variance[i] == pytest.approx(var, rel=1e-12)
        assert out.t[i] == pytest.approx(fit.params[0] / np.sqrt(var), rel=1e-12)


def _random_precisions(rng, n_runs, v, q):
    """Covariances of C b per run and voxel (random SPD), their inverses and the effects drawn from them."""
    covs, precisions, effects = [], [], []
    for _ in range(n_runs):
        A = rng.normal(size=(v, q, q))
        S = np.einsum("vij,vkj->vik", A, A) + 0.3 * np.eye(q)
        covs.append(S)
        precisions.append(np.linalg.inv(S))
        effects.append(np.stack([rng.multivariate_normal(np.full(q, 0.2), S[i]) for i in range(v)]).T)
    return covs, precisions, effects


def test_fixed_effects_f_is_the_stacked_gls_wald_test_of_statsmodels():
    import statsmodels.api as sm
    from scipy.linalg import block_diag

    rng = np.random.default_rng(22)
    q, v, dofs = 3, 12, [100.0, 110.0, 95.0]
    covs, precisions, effects = _random_precisions(rng, 3, v, q)
    effects[1][:, 0] = np.nan     # run 2 missing at voxel 0
    out = combine.fixed_effects_f(effects, precisions, dofs)
    for i in range(v):
        runs = [r for r in range(3) if np.isfinite(effects[r][:, i]).all()]
        y = np.concatenate([effects[r][:, i] for r in runs])
        X = np.vstack([np.eye(q)] * len(runs))
        sigma = block_diag(*[covs[r][i] for r in runs])
        # reference: statsmodels 0.15 GLS of the stacked run estimates on one common theta, with the
        # known block-diagonal covariance; Wald F of theta = 0 with cov_p = (X' Sigma^-1 X)^-1
        res = sm.GLS(y, X, sigma=sigma).fit()
        wald = res.wald_test(np.eye(q), cov_p=res.normalized_cov_params, use_f=True, scalar=True)
        dof2 = sum(dofs[r] for r in runs)
        assert out.f[i] == pytest.approx(float(wald.statistic), rel=1e-9)
        assert out.dof1[i] == q and out.dof2[i] == dof2 and out.n_runs[i] == len(runs)
        # reference: scipy.stats.f upper tail
        assert out.p[i] == pytest.approx(sps.f.sf(out.f[i], q, dof2), rel=1e-8)


def test_fixed_effects_f_of_one_row_is_the_square_of_the_fixed_effects_t():
    rng = np.random.default_rng(23)
    e = rng.normal(size=(3, 40))
    var = rng.uniform(0.2, 2.0, size=(3, 40))
    t_out = combine.fixed_effects(e, var, [50.0, 60.0, 70.0])
    f_out = combine.fixed_effects_f([row[None, :] for row in e], [(1.0 / vr)[:, None, None] for vr in var],
                                    [50.0, 60.0, 70.0])
    np.testing.assert_allclose(f_out.f, t_out.t ** 2, rtol=1e-12)
    # an F with one numerator dof has the two-sided p of its t (common practice: F(1, d) = t(d)^2)
    np.testing.assert_allclose(f_out.p, t_out.p, rtol=1e-9)


def test_run_contrast_moments_match_the_per_voxel_covariance_by_hand():
    rng = np.random.default_rng(24)
    p, v, q = 5, 9, 2
    X = rng.normal(size=(40, p))
    cov = np.stack([np.linalg.pinv(X.T @ X), np.linalg.pinv(X.T @ np.diag(rng.uniform(0.5, 2, 40)) @ X)])
    bins = rng.integers(0, 2, size=v)
    beta = rng.normal(size=(p, v))
    sigma2 = rng.uniform(0.5, 2.0, size=v)
    C = rng.normal(size=(q, p))
    m = combine.run_contrast_moments(C, beta, sigma2, bins, cov)
    for i in range(v):
        S = sigma2[i] * C @ cov[bins[i]] @ C.T        # reference: Searle (1971) sec. 5.5, by hand
        np.testing.assert_allclose(m.precision[i], np.linalg.inv(S), rtol=1e-10)
        np.testing.assert_allclose(m.effect[:, i], C @ beta[:, i], rtol=1e-12)
        assert m.rank[i] == q
