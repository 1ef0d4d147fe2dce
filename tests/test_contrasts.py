"""Tests of glmsteps.contrasts: specs to matrices, estimability, t/F maps."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.linalg import toeplitz

from glmsteps import contrasts
from glmsteps.errors import ContrastError

NAMES = ["A", "A__latency", "B", "C__fir00", "C__fir01", "C__fir02", "A__x_rt", "slow_01", "intercept"]
CONDS = ["A", "A", "B", "C", "C", "C", "A", "", ""]
BASIS = ["main", "latency", "main", "fir00", "fir01", "fir02", "modulator", "", ""]


def test_t_matrix_condition_column_and_fir_mean():
    C = contrasts.contrast_matrix({"weights": {"A": 1, "B": -1}}, NAMES, CONDS, BASIS)
    np.testing.assert_array_equal(C, [[1, 0, -1, 0, 0, 0, 0, 0, 0]])
    C = contrasts.contrast_matrix({"weights": {"C": 3, "A__latency": 2}}, NAMES, CONDS, BASIS)
    np.testing.assert_allclose(C, [[0, 2, 0, 1, 1, 1, 0, 0, 0]])


def test_f_matrix_all_expands_basis_columns():
    C = contrasts.contrast_matrix({"rows": [{"A__all": 1}, {"B": 1}]}, NAMES, CONDS, BASIS)
    expected = np.zeros((3, 9))
    expected[0, 0] = expected[1, 1] = expected[2, 2] = 1
    np.testing.assert_array_equal(C, expected)
    with pytest.raises(ContrastError, match="different numbers of basis columns"):
        contrasts.contrast_matrix({"rows": [{"A__all": 1, "C__all": -1}]}, NAMES, CONDS, BASIS)


def test_unknown_key_is_one_line_error_naming_contrast_key_and_choices():
    with pytest.raises(ContrastError) as info:
        contrasts.contrast_matrix({"weights": {"D": 1}}, NAMES, CONDS, BASIS, name="d_vs_rest")
    msg = str(info.value)
    assert "\n" not in msg
    assert "'d_vs_rest'" in msg and "'D'" in msg and "['A', 'B', 'C']" in msg and "slow_01" in msg


def test_bad_specs_are_rejected():
    for spec in ({"weights": {"A": 0}}, {"weights": {}}, {"weights": {"A": "x"}}, {"weights": {"A": 1}, "rows": []},
                 {"weights": {"A": 1}, "tail": "left"}, {"weights": {"A__all": 1}}):
        with pytest.raises(ContrastError):
            contrasts.contrast_matrix(spec, NAMES, CONDS, BASIS)


def test_estimability_zero_column_and_row_space():
    rng = np.random.default_rng(3)
    X = rng.normal(size=(40, 4))
    X[:, 2] = 0.0
    est = contrasts.estimability(X, np.array([[1, 0, -1, 0]]), ["A", "B", "C", "intercept"], ["A", "B", "C", ""])
    assert not est.estimable and "'C'" in est.reason and "no events" in est.reason
    # collinear columns: A - B is in the row space only if the duplicated columns get equal weight
    X = rng.normal(size=(40, 3))
    X = np.column_stack([X, X[:, 0]])
    # reference: Searle (1971) sec. 5.4, c' estimable iff c' X^+ X = c'
    assert not contrasts.estimability(X, np.array([[1, 0, 0, 0]])).estimable
    assert contrasts.estimability(X, np.array([[1, 0, 0, 1]])).estimable
    assert contrasts.estimability(X, np.array([[0, 1, -1, 0]])).estimable


def test_efficiency_equals_inverse_contrast_variance():
    rng = np.random.default_rng(4)
    X = rng.normal(size=(50, 3))
    c = np.array([[1.0, -1.0, 0.0]])
    # reference: Dale (1999) efficiency 1 / (c (X'X)^-1 c'), numpy solve on a full-rank design
    expected = 1.0 / (c @ np.linalg.solve(X.T @ X, c.T))[0, 0]
    assert contrasts.efficiency(X, c) == pytest.approx(expected, rel=1e-10)


def _simulate(n=60, n_vox=6, seed=5):
    rng = np.random.default_rng(seed)
    t_s = np.arange(n)
    X = np.column_stack([np.sin(t_s / 5.0), (t_s % 10 < 5).astype(float), np.cos(t_s / 9.0), np.ones(n)])
    beta_true = rng.normal(size=(4, n_vox))
    Y = X @ beta_true + rng.normal(size=(n, n_vox))
    return X, Y


def _ols_fit(X, Y):
    beta, *_ = np.linalg.lstsq(X, Y, rcond=None)
    resid = Y - X @ beta
    dof = X.shape[0] - np.linalg.matrix_rank(X)
    Xp = np.linalg.pinv(X)
    return beta, (resid ** 2).sum(0) / dof, Xp @ Xp.T, dof


def test_t_and_f_match_statsmodels_ols():
    X, Y = _simulate()
    beta, s2, cov, dof = _ols_fit(X, Y)
    v = Y.shape[1]
    c = np.array([[1.0, -1.0, 0.0, 0.0]])
    C = np.array([[1.0, 0, 0, 0], [0, 1.0, 0, 0], [0, 0, 1.0, 0]])
    tr = contrasts.t_contrast(c, beta, s2, np.zeros(v, int), cov[None], np.full(v, dof), "two-sided")
    fr = contrasts.f_contrast(C, beta, s2, np.zeros(v, int), cov[None], np.full(v, dof))
    for i in range(v):
        res = sm.OLS(Y[:, i], X).fit()
        # reference: statsmodels OLS t_test / f_test
        tt = res.t_test(c)
        assert tr.effect[i] == pytest.approx(float(tt.effect[0]), rel=1e-9)
        assert np.sqrt(tr.variance[i]) == pytest.approx(float(tt.sd[0, 0]), rel=1e-9)
        assert tr.t[i] == pytest.approx(float(tt.tvalue[0, 0]), rel=1e-9)
        assert tr.p[i] == pytest.approx(float(tt.pvalue), rel=1e-7)
        ft = res.f_test(C)
        assert fr.f[i] == pytest.approx(float(ft.fvalue), rel=1e-9)
        assert fr.dof1[i] == ft.df_num and fr.dof2[i] == ft.df_denom
        assert fr.p[i] == pytest.approx(float(ft.pvalue), rel=1e-7)


def test_t_and_f_match_statsmodels_gls_with_two_noise_bins():
    n, v = 80, 6
    rng = np.random.default_rng(6)
    X, _ = _simulate(n=n, n_vox=v)
    rhos = np.array([0.2, 0.5])
    bins = np.array([0, 1, 0, 1, 1, 0])
    Y = np.empty((n, v))
    for i in range(v):
        e = np.empty(n)
        e[0] = rng.normal() / np.sqrt(1 - rhos[bins[i]] ** 2)
        for k in range(1, n):
            e[k] = rhos[bins[i]] * e[k - 1] + rng.normal()
        Y[:, i] = X @ rng.normal(size=4) + e
    # A stored prewhitened fit, computed here by hand with numpy: W'W = Sigma^-1
    beta = np.empty((4, v))
    s2 = np.empty(v)
    covs = np.empty((2, 4, 4))
    for b, rho in enumerate(rhos):
        sigma = toeplitz(rho ** np.arange(n))
        W = np.linalg.cholesky(np.linalg.inv(sigma)).T
        Xw = W @ X
        Xwp = np.linalg.pinv(Xw)
        covs[b] = Xwp @ Xwp.T
        for i in np.flatnonzero(bins == b):
            yw = W @ Y[:, i]
            beta[:, i] = Xwp @ yw
            s2[i] = ((yw - Xw @ beta[:, i]) ** 2).sum() / (n - 4)
    dof = np.full(v, n - 4.0)
    c = np.array([[0.0, 1.0, -0.5, 0.0]])
    C = np.array([[1.0, 0, 0, 0], [0, 1.0, 0, 0]])
    tr = contrasts.t_contrast(c, beta, s2, bins, covs, dof, "positive")
    fr = contrasts.f_contrast(C, beta, s2, bins, covs, dof)
    for i in range(v):
        # reference: statsmodels GLS with sigma = toeplitz(rho^|i-j|)
        res = sm.GLS(Y[:, i], X, sigma=toeplitz(rhos[bins[i]] ** np.arange(n))).fit()
        tt = res.t_test(c)
        assert tr.t[i] == pytest.approx(float(tt.tvalue[0, 0]), rel=1e-8)
        assert tr.effect[i] == pytest.approx(float(tt.effect[0]), rel=1e-8)
        # one-sided p is half the two-sided p on the side of the effect
        expected_p = tt.pvalue / 2 if tt.tvalue[0, 0] > 0 else 1 - tt.pvalue / 2
        assert tr.p[i] == pytest.approx(float(expected_p), rel=1e-7)
        assert fr.f[i] == pytest.approx(float(res.f_test(C).fvalue), rel=1e-8)


@pytest.mark.filterwarnings("ignore:The design matrix is rank-deficient")
def test_compute_contrast_not_estimable_gives_nan_maps_and_reason():
    X, Y = _simulate()
    X[:, 1] = 0.0
    beta, s2, cov, dof = _ols_fit(X, Y)
    names, conds, basis = ["A", "B", "slow_01", "intercept"], ["A", "B", "", ""], ["main", "main", "", ""]
    spec = contrasts.parse_spec("a_vs_b", {"weights": {"A": 1, "B": -1}})
    out = contrasts.evaluate_contrast(spec, X, names, conds, basis, beta, s2, np.zeros(6, int), cov[None],
                                     np.full(6, dof))
    assert not out.estimable and "'B'" in out.reason
    assert all(np.isnan(m).all() for m in out.maps.values())
    spec = contrasts.parse_spec("a", {"weights": {"A": 1}, "tail": "negative"})
    out = contrasts.evaluate_contrast(spec, X, names, conds, basis, beta, s2, np.zeros(6, int), cov[None],
                                     np.full(6, dof))
    assert out.estimable and out.efficiency > 0
    # reference: statsmodels OLS t_test, one-sided p on the negative side
    tt = sm.OLS(Y[:, 0], X).fit().t_test([1, 0, 0, 0])
    assert out.maps["t"][0] == pytest.approx(float(tt.tvalue[0, 0]), rel=1e-9)


def test_old_design_column_names_are_errors_naming_the_new_name():
    # the basis and slow-signal columns were renamed (glmsteps.renames); an old name is never an alias
    for old, new in (("A__derivative", "A__latency"), ("A__dispersion", "A__width"), ("drift_01", "slow_01")):
        with pytest.raises(ContrastError) as info:
            contrasts.contrast_matrix({"weights": {old: 1}}, NAMES, CONDS, BASIS, name="old")
        msg = str(info.value)
        assert "\n" not in msg and f"'{old}'" in msg and f"'{new}'" in msg


def test_all_expands_latency_and_width_columns():
    names = ["A", "A__latency", "A__width", "A__x_rt", "intercept"]
    conds = ["A", "A", "A", "A", ""]
    basis = ["main", "latency", "width", "modulator", ""]
    C = contrasts.contrast_matrix({"rows": [{"A__all": 1}]}, names, conds, basis)
    # worked by hand: one row per response column of A (main, latency, width), the modulator left out
    np.testing.assert_array_equal(C, [[1, 0, 0, 0, 0], [0, 1, 0, 0, 0], [0, 0, 1, 0, 0]])
