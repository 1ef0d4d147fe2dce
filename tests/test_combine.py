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
