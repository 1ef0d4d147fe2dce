"""Tests of glmsteps.group: designs, OLS and mixed-effects group contrasts."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from reference import bcg
from scipy import optimize, stats
from scipy.optimize import elementwise
from statsmodels.stats.meta_analysis import combine_effects

from glmsteps import group as gm
from glmsteps import stats as glm_stats
from glmsteps.errors import GlmstepsWarning, GroupError


def participants(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "site": rng.choice(["a", "b", "c"], n),
        "age": rng.normal(40.0, 12.0, n),
        "sex": rng.choice(["f", "m"], n),
        "group": np.tile(["ctl", "pat"], n // 2 + 1)[:n],
    })


def test_regression_with_categorical_site_matches_statsmodels() -> None:
    table = participants(30, 1)
    design = gm.build_group_design(table, "regression", covariates=["age", "sex"], site_column="site")
    assert design.names == ["mean", "age", "sex[m]", "site[b]", "site[c]"]
    rng = np.random.default_rng(2)
    Y = rng.normal(size=(30, 7)) + 0.03 * table["age"].to_numpy()[:, None]
    c_age = gm.contrast_vector({"age": 1.0}, design.names, "age")
    c_mean = gm.contrast_vector({"mean": 1.0}, design.names, "mean")
    fit_age = gm.fit_ols_contrast(design.matrix, Y, c_age)
    fit_mean = gm.fit_ols_contrast(design.matrix, Y, c_mean)
    for v in (0, 3, 6):
        frame = table.assign(y=Y[:, v])
        # reference: statsmodels OLS formula with its own treatment coding of site and sex
        res = smf.ols("y ~ age + C(sex) + C(site)", data=frame).fit()
        assert fit_age.effect[v] == pytest.approx(res.params["age"], rel=1e-10)
        assert fit_age.t[v] == pytest.approx(res.tvalues["age"], rel=1e-10)
        assert fit_age.dof[v] == res.df_resid
        # The centred coding makes `mean` the prediction at the covariates' sample means
        # (whatever the coding), i.e. the t test of the mean row of statsmodels' own design.
        test = res.t_test(res.model.exog.mean(axis=0))
        assert fit_mean.effect[v] == pytest.approx(float(test.effect[0]), rel=1e-10)
        assert fit_mean.t[v] == pytest.approx(float(test.tvalue[0, 0]), rel=1e-10)
        assert fit_mean.variance[v] == pytest.approx(float(test.sd[0, 0]) ** 2, rel=1e-10)


def test_two_sample_difference_matches_statsmodels() -> None:
    table = participants(24, 3)
    design = gm.build_group_design(table, "two_sample", group_column="group", covariates=["age"])
    assert design.names == ["group[ctl]", "group[pat]", "age", "site[b]", "site[c]"]
    c = gm.contrast_vector({"group[pat]": 1, "group[ctl]": -1}, design.names, "pat_gt_ctl")
    Y = np.random.default_rng(4).normal(size=(24, 5))
    fit = gm.fit_ols_contrast(design.matrix, Y, c)
    for v in range(5):
        # reference: statsmodels OLS formula, treatment-coded group (pat - ctl)
        res = smf.ols("y ~ C(group) + age + C(site)", data=table.assign(y=Y[:, v])).fit()
        assert fit.t[v] == pytest.approx(res.tvalues["C(group)[T.pat]"], rel=1e-10)
        assert fit.effect[v] == pytest.approx(res.params["C(group)[T.pat]"], rel=1e-10)


def test_one_sample_and_paired_match_scipy_t_tests() -> None:
    rng = np.random.default_rng(5)
    Y = rng.normal(0.3, 1.0, size=(12, 4))
    table = pd.DataFrame({"x": np.arange(12)})
    design = gm.build_group_design(table, "one_sample", site_column=None)
    fit = gm.fit_ols_contrast(design.matrix, Y, np.array([1.0]))
    # reference: scipy.stats.ttest_1samp
    np.testing.assert_allclose(fit.t, stats.ttest_1samp(Y, 0.0, axis=0).statistic, rtol=1e-10)

    pairs = pd.DataFrame({"pair": np.repeat([f"p{i}" for i in range(6)], 2), "time": ["pre", "post"] * 6,
                          "site": np.repeat(["a", "a", "b"], 4)})
    paired = pd.DataFrame(rng.normal(size=(12, 4)) + (pairs["time"] == "post").to_numpy()[:, None] * 0.5)
    with pytest.warns(GlmstepsWarning, match="absorbed"):
        design = gm.build_group_design(pairs, "paired", group_column="time", pair_column="pair")
    assert design.names[0] == "time[pre]"  # levels sorted as text: post is the reference
    assert np.array_equal(design.blocks, np.repeat(np.arange(6), 2))
    fit = gm.fit_ols_contrast(design.matrix, paired.to_numpy(), gm.contrast_vector({"time[pre]": 1}, design.names, "d"))
    pre, post = paired.to_numpy()[0::2], paired.to_numpy()[1::2]
    # reference: scipy.stats.ttest_rel (pre - post)
    np.testing.assert_allclose(fit.t, stats.ttest_rel(pre, post, axis=0).statistic, rtol=1e-10)


def test_design_errors_are_one_line_group_errors() -> None:
    table = participants(20, 6)
    table["site"] = np.where(table["group"] == "pat", "a", "b")  # site confounded with group
    with pytest.raises(GroupError, match="linear combination"):
        gm.build_group_design(table, "two_sample", group_column="group")
    with pytest.raises(GroupError, match="not in the group design"):
        gm.contrast_vector({"age": 1}, ["mean"], "x")
    with pytest.raises(GroupError, match="constant"):
        gm.build_group_design(table.assign(age=3.0), "regression", covariates=["age"], site_column=None)
    pairs = pd.DataFrame({"pair": ["p1", "p1", "p2"], "time": ["a", "b", "a"]})
    with pytest.raises(GroupError, match="pair 'p2'"):
        gm.build_group_design(pairs, "paired", group_column="time", pair_column="pair", site_column=None)
    assert not gm.is_estimable(np.array([[1.0, 1.0], [1.0, 1.0], [1.0, 1.0]]), np.array([1.0, 0.0]))


def test_missing_subjects_are_dropped_per_voxel() -> None:
    table = participants(16, 7)
    design = gm.build_group_design(table, "regression", covariates=["age"], site_column=None)
    rng = np.random.default_rng(8)
    Y = rng.normal(size=(16, 3))
    Y[[2, 5], 1] = np.nan
    c = gm.contrast_vector({"age": 1}, design.names, "age")
    fit, bad = gm.fit_contrast_with_missing(design.matrix, Y, None, c, "ols")
    assert bad == 0
    keep = np.isfinite(Y[:, 1])
    # reference: statsmodels OLS on the subjects present at that voxel
    res = sm.OLS(Y[keep, 1], sm.add_constant(table["age"].to_numpy()[keep])).fit()
    assert fit.t[1] == pytest.approx(res.tvalues[1], rel=1e-10)
    assert fit.dof[1] == 12 and fit.dof[0] == 14


# --------------------------------------------------------------------------- mixed effects

def restricted_loglik(tau2: float, X: np.ndarray, y: np.ndarray, v: np.ndarray) -> float:
    """REML log-likelihood, written out directly (reference: Harville 1977, JASA 72:320, eq. for l_R)."""
    w = 1.0 / (v + tau2)
    xtwx = X.T @ (w[:, None] * X)
    b = np.linalg.solve(xtwx, X.T @ (w * y))
    r = y - X @ b
    return -0.5 * (np.sum(np.log(v + tau2)) + np.linalg.slogdet(xtwx)[1] + np.sum(w * r**2))


def test_reml_maximises_the_restricted_likelihood() -> None:
    rng = np.random.default_rng(10)
    n = 15
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    V = rng.uniform(0.2, 2.0, size=(n, 6))
    Y = rng.normal(size=(n, 6)) * np.sqrt(V + 0.8)
    tau2, converged = gm.estimate_between_variance_reml(X, Y, V)
    assert converged.all()
    for v in range(6):
        # reference: bounded 1-D maximisation of the restricted likelihood with scipy
        best = optimize.minimize_scalar(lambda t: -restricted_loglik(t, X, Y[:, v], V[:, v]), bounds=(0.0, 50.0),
                                        method="bounded", options={"xatol": 1e-10})
        assert tau2[v] == pytest.approx(best.x, abs=1e-5)


def _hard_reml_set(n_vox: int = 20000) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """16 subjects with first-level variances spread 100x and tau^2 from 0 to the mean variance.

    Plain Fisher scoring leaves 143 of these 20,000 voxels unconverged after 100 iterations
    (0.7 %, the oscillation of issue 18), and on a few the restricted likelihood has two local
    maxima (one at tau^2 = 0, a higher one inside).
    """
    rng = np.random.default_rng(2024)
    n = 16
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    V = np.exp(rng.uniform(np.log(0.05), np.log(5.0), size=(n, n_vox)))
    tau = np.repeat([0.0, 0.01, 0.05, 0.2, 1.0], n_vox // 5)
    Y = rng.normal(size=(n, n_vox)) * np.sqrt(V + tau)
    return X, Y, V


def _neg_restricted_loglik_two_columns(X: np.ndarray, Y: np.ndarray, V: np.ndarray):
    """-l_R(tau^2) of voxels ``idx`` for X = [1, x], by the explicit 2 x 2 normal-equation algebra.

    reference: Harville (1977) l_R = -1/2 [sum log(v + t) + log|X'WX| + y'Py], written out for two
    columns with Cramer's rule (independent of glmsteps' QR code).
    """
    x = X[:, 1]

    def f(t: np.ndarray, idx: np.ndarray) -> np.ndarray:
        tot = V[:, idx] + t
        w = 1.0 / tot
        y = Y[:, idx]
        s0, s1, s2 = w.sum(0), (w * x[:, None]).sum(0), (w * x[:, None] ** 2).sum(0)
        r0, r1 = (w * y).sum(0), (w * x[:, None] * y).sum(0)
        det = s0 * s2 - s1 * s1
        b0, b1 = (s2 * r0 - s1 * r1) / det, (s0 * r1 - s1 * r0) / det
        res = y - b0 - b1 * x[:, None]
        return 0.5 * (np.log(tot).sum(0) + np.log(det) + (w * res**2).sum(0))

    return f


@pytest.mark.slow
def test_reml_equals_direct_maximisation_on_20k_voxels() -> None:
    X, Y, V = _hard_reml_set()
    n_vox = Y.shape[1]
    result = gm.estimate_between_variance_reml(X, Y, V)
    assert result.converged.all()
    f = _neg_restricted_loglik_two_columns(X, Y, V)
    # reference: direct numerical maximisation of l_R with scipy.optimize: a 241-point scan over
    # [0, 3 s^2] (log-spaced above 1e-7 s^2) picks the best point, then scipy.optimize.elementwise
    # .find_minimum (Chandrupatla's bracketing minimiser) refines it inside its neighbours.
    every = np.arange(n_vox)
    s2 = ((Y - X @ np.linalg.lstsq(X, Y, rcond=None)[0]) ** 2).sum(0) / (X.shape[0] - 2)
    grid = np.concatenate([[0.0], np.geomspace(1e-7, 3.0, 240)])
    values = np.stack([f(g * s2, every) for g in grid])
    k = values.argmin(axis=0)
    assert np.all(k < grid.size - 1)                       # the scan's upper end is never the best
    ref = np.zeros(n_vox)
    inner = k > 0
    kk = k[inner]
    found = elementwise.find_minimum(f, (grid[kk - 1] * s2[inner], grid[kk] * s2[inner], grid[kk + 1] * s2[inner]),
                                     args=(every[inner],), tolerances={"xrtol": 1e-12, "xatol": 0.0})
    assert found.success.all()
    ref[inner] = found.x
    scale = V.mean(axis=0)
    # the minimiser locates x to ~sqrt(eps) of the flat top; 1e-6 of the voxel's variance scale
    diff = np.abs(result.tau2 - ref) / (ref + scale)
    assert diff.max() < 1e-6, (diff.max(), int(np.argmax(diff)))
    # and no direct maximum is higher than glmsteps' (beyond rounding of l_R)
    assert np.max(f(result.tau2, every) - f(ref, every)) < 1e-9


def test_reml_takes_the_higher_of_two_local_maxima() -> None:
    X, Y, V = _hard_reml_set()
    v = 1064        # a voxel of the set where l_R falls from tau^2 = 0, then rises to a higher maximum
    tau2 = gm.estimate_between_variance_reml(X, Y[:, [v]], V[:, [v]]).tau2[0]
    ll = lambda t: restricted_loglik(t, X, Y[:, v], V[:, v])  # noqa: E731
    # reference: the restricted likelihood written out (Harville 1977) at both candidates
    assert ll(1e-6) < ll(0.0)                 # tau^2 = 0 is a local maximum ...
    assert tau2 > 0.5 and ll(tau2) > ll(0.0) + 0.5   # ... but not the global one


# BCG vaccine trials: Colditz et al. (1994), analysed in Viechtbauer (2010) J Stat Softw 36(3).

def test_reml_and_dl_match_the_published_bcg_meta_analysis() -> None:
    y, v = bcg.EFFECT[:, None], bcg.VARIANCE[:, None]
    ones = np.ones((y.size, 1))
    # Cochran's Q (fixed-effect weights): the published value checks the trial counts
    w = 1.0 / bcg.VARIANCE
    mean_fe = np.sum(w * bcg.EFFECT) / w.sum()
    assert np.sum(w * (bcg.EFFECT - mean_fe) ** 2) == pytest.approx(bcg.Q_STATISTIC, abs=bcg.PRINTED)
    # reference: Viechtbauer (2010) sec. 3, rma() REML output (from memory)
    tau2 = gm.estimate_between_variance_reml(ones, y, v).tau2[0]
    assert tau2 == pytest.approx(bcg.REML_TAU2, abs=bcg.PRINTED)
    weights = 1.0 / (bcg.VARIANCE + tau2)
    assert np.sum(weights * bcg.EFFECT) / weights.sum() == pytest.approx(bcg.REML_ESTIMATE, abs=bcg.PRINTED)
    assert 1.0 / np.sqrt(weights.sum()) == pytest.approx(bcg.REML_SE, abs=bcg.PRINTED)
    # reference: Viechtbauer (2010) rma(method = "DL") (from memory), and statsmodels 0.15
    # combine_effects(method_re="dl")
    dl = gm.estimate_between_variance_dl(ones, y, v)[0]
    assert dl == pytest.approx(bcg.DL_TAU2, abs=bcg.PRINTED)
    combined = combine_effects(bcg.EFFECT, bcg.VARIANCE, method_re="dl")
    assert dl == pytest.approx(combined.tau2, rel=1e-12)


def test_reml_meta_regression_matches_the_published_bcg_models() -> None:
    y, v = bcg.EFFECT[:, None], bcg.VARIANCE[:, None]
    X = np.column_stack([np.ones(y.size), bcg.ABLAT])
    tau2 = gm.estimate_between_variance_reml(X, y, v).tau2[0]
    # reference: Viechtbauer (2010) sec. 3, rma(yi, vi, mods = ~ ablat) (from memory)
    assert tau2 == pytest.approx(bcg.REML_ABLAT_TAU2, abs=bcg.PRINTED)
    fit = gm.weighted_fit(X, y, 1.0 / (v + tau2))
    np.testing.assert_allclose(fit.beta[:, 0], bcg.REML_ABLAT_COEF, atol=bcg.PRINTED)
    X2 = np.column_stack([X, bcg.YEAR])
    # reference: Viechtbauer (2010), rma(yi, vi, mods = ~ ablat + year) (from memory)
    assert gm.estimate_between_variance_reml(X2, y, v).tau2[0] == pytest.approx(bcg.REML_ABLAT_YEAR_TAU2,
                                                                                 abs=bcg.PRINTED)


def test_hartung_knapp_variance_matches_statsmodels_on_bcg() -> None:
    y, v = bcg.EFFECT[:, None], bcg.VARIANCE[:, None]
    fit = gm.fit_mixed_contrast(np.ones((y.size, 1)), y, v, np.array([1.0]), "mixed_dl")
    combined = combine_effects(bcg.EFFECT, bcg.VARIANCE, method_re="dl")
    # reference: statsmodels 0.15 combine_effects, random-effects mean and its HKSJ standard error
    assert fit.effect[0] == pytest.approx(combined.mean_effect_re, rel=1e-12)
    assert np.sqrt(fit.variance[0]) == pytest.approx(combined.sd_eff_w_re_hksj, rel=1e-10)
    assert fit.dof[0] == bcg.EFFECT.size - 1


def test_mixed_with_zero_first_level_variance_equals_ols() -> None:
    table = participants(18, 12)
    design = gm.build_group_design(table, "regression", covariates=["age"])
    Y = np.random.default_rng(13).normal(size=(18, 20))
    c = gm.contrast_vector({"age": 1}, design.names, "age")
    ols = gm.fit_ols_contrast(design.matrix, Y, c)
    mixed = gm.fit_mixed_contrast(design.matrix, Y, np.zeros_like(Y), c, "mixed_reml")
    # REML of the residual variance with no first-level variance is RSS / (n - p) (Harville 1977), and
    # then the Hartung-Knapp factor is 1: the OLS t test (reference: fit_ols_contrast, itself checked
    # against statsmodels OLS above)
    np.testing.assert_allclose(mixed.effect, ols.effect, rtol=1e-8)
    np.testing.assert_allclose(mixed.variance, ols.variance, rtol=1e-6)
    np.testing.assert_allclose(mixed.t, ols.t, rtol=1e-6)
    np.testing.assert_array_equal(mixed.dof, ols.dof)


@pytest.mark.parametrize("method", ["mixed_dl", "mixed_reml"])
def test_mixed_fit_matches_statsmodels_wls(method: str) -> None:
    rng = np.random.default_rng(15)
    n = 20
    X = np.column_stack([np.ones(n), rng.normal(size=n), rng.normal(size=n)])
    V = rng.uniform(0.3, 1.0, size=(n, 4))
    Y = rng.normal(size=(n, 4)) * np.sqrt(V + 0.5)
    c = np.array([0.0, 1.0, -0.5])
    fit = gm.fit_mixed_contrast(X, Y, V, c, method)
    robust = gm.fit_mixed_contrast(X, Y, V, c, method, inference="robust")
    for v in range(4):
        w = 1.0 / (V[:, v] + fit.between_variance[v])
        # reference: statsmodels 0.15 WLS with weights 1/(V + tau^2): estimated scale = Hartung-Knapp,
        # HC2 covariance = the robust variance
        res = sm.WLS(Y[:, v], X, weights=w).fit()
        test = res.t_test(c)
        assert fit.effect[v] == pytest.approx(float(test.effect[0]), rel=1e-10)
        assert fit.variance[v] == pytest.approx(float(test.sd[0, 0]) ** 2, rel=1e-10)
        assert fit.t[v] == pytest.approx(float(test.tvalue[0, 0]), rel=1e-10)
        hc2 = sm.WLS(Y[:, v], X, weights=w).fit(cov_type="HC2")
        assert robust.variance[v] == pytest.approx(float(c @ hc2.cov_params() @ c), rel=1e-10)
    assert np.all(fit.dof == n - 3)


def test_robust_dof_of_an_equal_weight_one_sample_design_is_n_minus_1() -> None:
    rng = np.random.default_rng(16)
    Y = rng.normal(size=(9, 5))
    fit = gm.fit_mixed_contrast(np.ones((9, 1)), Y, np.full((9, 5), 1e-12), np.array([1.0]), "mixed_dl",
                                inference="robust")
    # reference: scipy.stats.ttest_1samp (Bell & McCaffrey 2002: with equal weights HC2 is s^2 / n on n - 1 dof)
    np.testing.assert_allclose(fit.t, stats.ttest_1samp(Y, 0.0).statistic, rtol=1e-8)
    np.testing.assert_allclose(fit.dof, 8.0, rtol=1e-8)


@pytest.mark.slow
@pytest.mark.parametrize("tau2", [0.0, 0.5, 2.0])
def test_mixed_effects_null_rate_at_p_0001(tau2: float) -> None:
    """REML + Hartung-Knapp on null data: the two-sided false-positive count at p < 0.001.

    20 subjects; each subject's first-level variance has its own level (uniform 0.7-1.4, a 2x
    spread) times a per-voxel factor (uniform 0.7-1.3); 100,000 independent voxels.
    """
    n, n_vox = 20, 100_000
    rng = np.random.default_rng(31 + int(10 * tau2))
    V = rng.uniform(0.7, 1.4, size=(n, 1)) * rng.uniform(0.7, 1.3, size=(n, n_vox))
    Y = rng.normal(size=(n, n_vox)) * np.sqrt(V + tau2)
    fit = gm.fit_mixed_contrast(np.ones((n, 1)), Y, V, np.array([1.0]), "mixed_reml")
    count = int(np.sum(glm_stats.t_pvalue(fit.t, fit.dof, "two-sided") < 0.001))
    # reference: scipy.stats.binom.interval, the 95 % interval of the count under the nominal rate
    low, high = stats.binom.interval(0.95, n_vox, 0.001)
    assert low <= count <= high, (tau2, count, (low, high))


def test_site_summary_counts_and_means() -> None:
    Y = np.array([[1.0, 3.0], [2.0, 4.0], [10.0, 10.0]])
    table, means = gm.summarise_sites(Y, ["a", "a", "b"])
    np.testing.assert_allclose(means, [2.0, 3.0, 10.0])  # reference: hand arithmetic
    assert table["n_subjects"].tolist() == [2, 1]
    assert table["mean_effect"].tolist() == [2.5, 10.0]
    assert table.loc[0, "sd_between_subjects"] == pytest.approx(np.sqrt(0.5))
