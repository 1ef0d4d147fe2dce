"""Tests of glmsteps.group: designs, OLS and mixed-effects group contrasts."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from scipy import optimize, stats

from glmsteps import group as gm
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


def test_reml_recovers_between_variance_within_standard_error() -> None:
    rng = np.random.default_rng(11)
    n, n_vox, tau2_true = 40, 3000, 2.0
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    V = rng.uniform(0.2, 1.0, size=(n, n_vox))
    Y = 1.0 + rng.normal(size=(n, n_vox)) * np.sqrt(V + tau2_true)
    tau2, _ = gm.estimate_between_variance_reml(X, Y, V)
    # Over independent voxels the mean estimate lies within 3 standard errors of the truth
    # (3 SE: two-sided 0.27 % false alarm under a normal sampling distribution).
    se = tau2.std(ddof=1) / np.sqrt(n_vox)
    assert abs(tau2.mean() - tau2_true) < 3 * se


def test_mixed_with_zero_first_level_variance_equals_ols() -> None:
    table = participants(18, 12)
    design = gm.build_group_design(table, "regression", covariates=["age"])
    Y = np.random.default_rng(13).normal(size=(18, 20))
    c = gm.contrast_vector({"age": 1}, design.names, "age")
    ols = gm.fit_ols_contrast(design.matrix, Y, c)
    mixed = gm.fit_mixed_contrast(design.matrix, Y, np.zeros_like(Y), c, "mixed_reml")
    # REML of the residual variance with no first-level variance is RSS / (n - p) (Harville 1977)
    np.testing.assert_allclose(mixed.effect, ols.effect, rtol=1e-8)
    np.testing.assert_allclose(mixed.variance, ols.variance, rtol=1e-6)
    np.testing.assert_allclose(mixed.t, ols.t, rtol=1e-6)
    np.testing.assert_array_equal(mixed.dof, ols.dof)


def test_dersimonian_laird_matches_closed_form() -> None:
    rng = np.random.default_rng(14)
    k = 12
    V = rng.uniform(0.1, 1.5, size=(k, 50))
    Y = rng.normal(size=(k, 50)) * np.sqrt(V + rng.uniform(0, 1, 50))
    tau2 = gm.estimate_between_variance_dl(np.ones((k, 1)), Y, V)
    # reference: DerSimonian & Laird (1986) eq. 8, written independently
    w = 1.0 / V
    mean_w = (w * Y).sum(0) / w.sum(0)
    q = (w * (Y - mean_w) ** 2).sum(0)
    expected = np.maximum(0.0, (q - (k - 1)) / (w.sum(0) - (w**2).sum(0) / w.sum(0)))
    np.testing.assert_allclose(tau2, expected, rtol=1e-10, atol=1e-12)
    assert np.any(expected == 0) and np.any(expected > 0)


def test_mixed_final_fit_matches_statsmodels_wls() -> None:
    rng = np.random.default_rng(15)
    n = 20
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    V = rng.uniform(0.3, 1.0, size=(n, 4))
    Y = rng.normal(size=(n, 4)) * np.sqrt(V + 0.5)
    c = np.array([0.0, 1.0])
    fit = gm.fit_mixed_contrast(X, Y, V, c, "mixed_dl")
    for v in range(4):
        w = 1.0 / (V[:, v] + fit.between_variance[v])
        # reference: statsmodels WLS with known weights (scale fixed at 1)
        res = sm.WLS(Y[:, v], X, weights=w).fit(cov_type="fixed scale")
        assert fit.effect[v] == pytest.approx(res.params[1], rel=1e-10)
        assert fit.variance[v] == pytest.approx(res.bse[1] ** 2, rel=1e-10)
    assert np.all(fit.dof == n - 2)


def test_site_summary_counts_and_means() -> None:
    Y = np.array([[1.0, 3.0], [2.0, 4.0], [10.0, 10.0]])
    table, means = gm.summarise_sites(Y, ["a", "a", "b"])
    np.testing.assert_allclose(means, [2.0, 3.0, 10.0])  # reference: hand arithmetic
    assert table["n_subjects"].tolist() == [2, 1]
    assert table["mean_effect"].tolist() == [2.5, 10.0]
    assert table.loc[0, "sd_between_subjects"] == pytest.approx(np.sqrt(0.5))
