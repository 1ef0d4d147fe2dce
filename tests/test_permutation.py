"""Tests of glmsteps.permutation: permutation sets, Freedman-Lane, clusters, TFCE, FWER."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import ndimage, stats

from glmsteps import clusters
from glmsteps import permutation as pm


def test_permutation_sets_start_with_identity() -> None:
    flips = pm.make_sign_flips(np.arange(9), 50, seed=1)
    assert flips.shape == (50, 9)
    assert np.all(flips[0] == 1) and set(np.unique(flips)) == {-1.0, 1.0}
    paired = pm.make_sign_flips(np.repeat(np.arange(4), 2), 30, seed=1)
    assert np.all(paired[:, 0::2] == paired[:, 1::2])  # both members of a pair share a sign
    orders = pm.make_row_permutations(7, 40, seed=2)
    assert np.array_equal(orders[0], np.arange(7))
    assert all(sorted(row) == list(range(7)) for row in orders)
    assert np.array_equal(pm.make_row_permutations(7, 40, seed=2), orders)  # fixed seed, same draws


def test_identity_t_equals_statsmodels_ols() -> None:
    rng = np.random.default_rng(3)
    n = 14
    X = np.column_stack([np.ones(n), rng.normal(size=n), rng.normal(size=n)])
    Y = rng.normal(size=(n, 8))
    result = pm.run_permutation_test(X, Y, np.array([0.0, 1.0, 0.0]), np.arange(8), (2, 2, 2), "permute", 20,
                                     seed=0, cluster_threshold=2.0)
    for v in range(8):
        # reference: statsmodels OLS
        assert result.t[v] == pytest.approx(sm.OLS(Y[:, v], X).fit().tvalues[1], rel=1e-10)


@pytest.mark.parametrize("method", ["permute", "sign_flip"])
def test_freedman_lane_matches_explicit_refit(method: str) -> None:
    rng = np.random.default_rng(4)
    n = 12
    X = np.column_stack([np.ones(n), rng.normal(size=n), rng.normal(size=n)])
    c = np.array([0.0, 1.0, 0.0]) if method == "permute" else np.array([1.0, 0.0, 0.0])
    Y = rng.normal(size=(n, 5)) + X[:, [2]]
    model = pm.build_freedman_lane(X, c)
    draws = pm.make_sign_flips(np.arange(n), 6, 9) if method == "sign_flip" else pm.make_row_permutations(n, 6, 9)
    ops = pm.permutation_operators(model, method, draws)
    fitted = model.reduced_projector @ Y
    resid = Y - fitted
    t = pm.t_from_operators(model, ops, resid, model.contrast_weights @ fitted, (resid**2).sum(0))
    # reference: Winkler et al. (2014) table 2, Freedman-Lane: Y* = P R_Z + H_Z Y with Z the model
    # restricted by c'b = 0, then the full model refitted by statsmodels OLS.
    Z = X[:, [0, 2]] if method == "permute" else X[:, [1, 2]]
    hz = Z @ np.linalg.pinv(Z)
    for b in range(6):
        r = Y - hz @ Y
        permuted = r * draws[b][:, None] if method == "sign_flip" else r[draws[b]]
        y_star = permuted + hz @ Y
        for v in range(5):
            res = sm.OLS(y_star[:, v], X).fit()
            assert t[b, v] == pytest.approx(float(res.t_test(c).tvalue[0, 0]), rel=1e-9)


def test_tfce_hand_computed_1d() -> None:
    values = np.array([0.0, 1.0, 2.0, 1.0, 0.0, 3.0])
    grid = clusters.make_spatial_grid(np.arange(6), (6,))
    scores = pm.tfce_scores(values, grid, step=1.0, extent_power=0.5, height_power=2.0)
    # By hand (Smith & Nichols 2009 eq. 1, dh = 1): h = 1 clusters {1,2,3} (e = 3) and {5} (e = 1);
    # h = 2 {2}, {5}; h = 3 {5}. Voxel 1: sqrt(3) * 1; voxel 2: sqrt(3) + 1 * 4;
    # voxel 5: 1 + 4 + 9.
    expected = [0.0, np.sqrt(3), np.sqrt(3) + 4.0, np.sqrt(3), 0.0, 14.0]
    np.testing.assert_allclose(scores, expected, rtol=1e-12)


def test_tfce_single_voxel_converges_to_integral() -> None:
    grid = clusters.make_spatial_grid(np.arange(5), (5,))
    values = np.array([0.0, 0.0, 2.5, 0.0, 0.0])
    scores = pm.tfce_scores(values, grid, step=1e-3)
    # reference: Smith & Nichols (2009) eq. 1 with e = 1: integral_0^s h^2 dh = s^3 / 3; the right Riemann
    # sum over-estimates it by at most s^2 * dh.
    assert abs(scores[2] - 2.5**3 / 3) <= 2.5**2 * 1e-3


def test_cluster_extent_and_mass_on_tiny_map() -> None:
    volume = np.zeros((4, 4, 3))
    volume[0, 0, 0], volume[0, 1, 0], volume[1, 0, 0] = 3.0, 4.0, 3.5   # an L of three voxels
    volume[1, 1, 1] = 5.0                                                 # touches the L by a corner / edge
    volume[3, 3, 2] = 6.0                                                 # isolated
    volume[3, 2, 0] = 1.0                                                 # below threshold
    grid26 = clusters.make_spatial_grid(np.arange(volume.size), volume.shape, connectivity=26)
    grid6 = clusters.make_spatial_grid(np.arange(volume.size), volume.shape, connectivity=6)
    _, extent26, mass26 = clusters.cluster_extent_mass(volume.reshape(-1), 2.0, grid26)
    _, extent6, mass6 = clusters.cluster_extent_mass(volume.reshape(-1), 2.0, grid6)
    # counted by hand: with 26 neighbours the L and (1,1,1) join (shared edge with (0,1,0) etc.)
    assert sorted(zip(extent26, mass26)) == [(1.0, 6.0), (4.0, 15.5)]
    assert sorted(zip(extent6, mass6)) == [(1.0, 5.0), (1.0, 6.0), (3.0, 10.5)]


def test_fwe_p_values_count_maxima() -> None:
    rng = np.random.default_rng(5)
    maxima = rng.normal(size=37)
    observed = np.concatenate([rng.normal(size=10), maxima[:3]])
    # reference: direct counting (Nichols & Holmes 2002)
    expected = [np.mean(maxima >= o) for o in observed]
    np.testing.assert_allclose(pm.fwe_p_values(observed, maxima), expected)


def smooth_null(rng: np.random.Generator, n: int, shape: tuple[int, int, int], fwhm_vox: float) -> np.ndarray:
    sigma = fwhm_vox / np.sqrt(8 * np.log(2))
    data = np.stack([ndimage.gaussian_filter(rng.normal(size=shape), sigma) for _ in range(n)])
    return (data / data.std(axis=0, keepdims=True)).reshape(n, -1)


def test_strong_effect_reaches_minimum_p_but_never_below() -> None:
    rng = np.random.default_rng(6)
    shape = (6, 6, 4)
    Y = smooth_null(rng, 10, shape, 2.0)
    Y[:, :20] += 3.0
    result = pm.run_permutation_test(np.ones((10, 1)), Y, np.array([1.0]), np.arange(Y.shape[1]), shape,
                                     "sign_flip", 64, seed=3, cluster_threshold=2.5, tfce=True, tfce_step=0.2)
    assert result.p_fwe.min() == pytest.approx(1 / 64)
    assert np.all(result.p_fwe >= 1 / 64) and np.all(result.p_fwe_extent >= 1 / 64)
    assert np.all(result.p_fwe_tfce >= 1 / 64)
    assert result.p_fwe_tfce[:20].max() <= 0.05


@pytest.mark.slow
@pytest.mark.parametrize("method, tail", [("sign_flip", "two-sided"), ("permute", "positive")])
def test_fwer_calibration_on_smooth_null_data(method: str, tail: str) -> None:
    n_datasets, n_perm, n = 200, 100, 12
    shape = (14, 14, 12)                                  # 2,352 voxels
    rng = np.random.default_rng(7 if method == "sign_flip" else 8)
    if method == "sign_flip":
        X, c = np.ones((n, 1)), np.array([1.0])
    else:
        X = np.column_stack([np.ones(n), rng.normal(size=n), rng.normal(size=n)])
        c = np.array([0.0, 1.0, 0.0])
    threshold = stats.t.isf(0.01, n - X.shape[1])
    any_voxel = any_cluster = 0
    for k in range(n_datasets):
        Y = smooth_null(rng, n, shape, 3.0)
        if method == "permute":
            Y = Y + 0.8 * X[:, [2]]                       # a real nuisance effect
        result = pm.run_permutation_test(X, Y, c, np.arange(Y.shape[1]), shape, method, n_perm, seed=k,
                                         cluster_threshold=threshold, tail=tail)
        any_voxel += bool(np.nanmin(result.p_fwe) < 0.05)
        any_cluster += bool(result.p_fwe_extent.size and result.p_fwe_extent.min() < 0.05)
    # With 100 draws p < 0.05 means at most 4 maxima >= observed: exact level 0.04 under H0.
    # reference: scipy.stats.binom.interval, 95 % interval of the count of datasets with a false positive.
    low, high = stats.binom.interval(0.95, n_datasets, 0.05)
    assert low <= any_voxel <= high, any_voxel
    assert low <= any_cluster <= high, any_cluster


def test_paired_block_flips_equal_label_swaps_within_pairs() -> None:
    rng = np.random.default_rng(9)
    n_pairs = 6
    blocks = np.repeat(np.arange(n_pairs), 2)
    condition = np.tile([1.0, 0.0], n_pairs)
    X = np.column_stack([condition, (blocks[:, None] == np.arange(n_pairs)).astype(float)])
    c = np.zeros(X.shape[1])
    c[0] = 1.0
    Y = rng.normal(size=(2 * n_pairs, 4)) + condition[:, None] * 0.7 + blocks[:, None] * 0.3
    model = pm.build_freedman_lane(X, c)
    flips = pm.make_sign_flips(blocks, 8, seed=4)
    fitted = model.reduced_projector @ Y
    resid = Y - fitted
    t = pm.t_from_operators(model, pm.permutation_operators(model, "sign_flip", flips), resid,
                            model.contrast_weights @ fitted, (resid**2).sum(0))
    for b in range(8):
        swapped = np.arange(2 * n_pairs)
        for k in np.flatnonzero(flips[b, 0::2] < 0):
            swapped[[2 * k, 2 * k + 1]] = [2 * k + 1, 2 * k]
        for v in range(4):
            # reference: statsmodels OLS refit with the two members of each flipped pair exchanged
            res = sm.OLS(Y[swapped, v], X).fit()
            assert t[b, v] == pytest.approx(res.tvalues[0], rel=1e-9)


def _one_sample_draws(n: int, n_perm: int, seed: int) -> np.ndarray:
    return pm.make_sign_flips(np.arange(n), n_perm, seed)


@pytest.mark.parametrize("tail", ["two-sided", "positive", "negative"])
def test_maximum_statistic_follows_the_tail(tail: str) -> None:
    rng = np.random.default_rng(21)
    n, shape = 10, (4, 4, 3)
    Y = rng.normal(size=(n, 48))
    result = pm.run_permutation_test(np.ones((n, 1)), Y, np.array([1.0]), np.arange(48), shape, "sign_flip", 30,
                                     seed=4, cluster_threshold=2.0, tail=tail)
    signs = _one_sample_draws(n, 30, 4)
    for b in range(30):
        # reference: scipy.stats.ttest_1samp of the sign-flipped data; the maximum of t, -t or |t|
        t = stats.ttest_1samp(Y * signs[b][:, None], 0.0).statistic
        expected = {"positive": t.max(), "negative": (-t).max(), "two-sided": np.abs(t).max()}[tail]
        assert result.max_t[b] == pytest.approx(expected, rel=1e-10)
    oriented = {"positive": result.t, "negative": -result.t, "two-sided": np.abs(result.t)}[tail]
    # reference: direct counting (Nichols & Holmes 2002)
    np.testing.assert_allclose(result.p_fwe, [np.mean(result.max_t >= o) for o in oriented])


def test_negative_effect_survives_two_sided_and_negative_but_not_positive() -> None:
    rng = np.random.default_rng(22)
    shape = (6, 6, 4)
    Y = smooth_null(rng, 12, shape, 2.0)
    Y[:, :20] -= 2.5                                    # a planted NEGATIVE effect on 20 voxels
    p = {}
    for tail in ("two-sided", "negative", "positive"):
        result = pm.run_permutation_test(np.ones((12, 1)), Y, np.array([1.0]), np.arange(Y.shape[1]), shape,
                                         "sign_flip", 200, seed=5, cluster_threshold=stats.t.isf(0.005, 11),
                                         tfce=True, tfce_step=0.2, tail=tail)
        p[tail] = result
    for tail in ("two-sided", "negative"):
        assert p[tail].p_fwe[:20].max() <= 0.05 and p[tail].p_fwe_tfce[:20].max() <= 0.05
        assert p[tail].cluster_sign.size and p[tail].cluster_sign[np.argmax(p[tail].extent)] == -1.0
        assert p[tail].p_fwe_extent[np.argmax(p[tail].extent)] <= 0.05
    # with the positive tail the planted voxels are the least significant of all
    assert p["positive"].p_fwe[:20].min() > 0.5


def test_two_sided_clusters_of_opposite_sign_stay_apart() -> None:
    values = np.zeros((5, 5, 5))
    values[1, 1, 1], values[1, 1, 2] = 4.0, -4.0        # touching voxels of opposite sign
    grid = clusters.make_spatial_grid(np.arange(values.size), values.shape, 6)
    labels, extent, mass, sign = pm.signed_clusters(values.ravel(), 2.0, grid, "two-sided")
    # counted by hand: two one-voxel clusters, masses |t| = 4, signs + and -
    assert sorted(extent.tolist()) == [1.0, 1.0] and sorted(mass.tolist()) == [4.0, 4.0]
    assert sorted(sign.tolist()) == [-1.0, 1.0]
    assert labels[np.ravel_multi_index((1, 1, 1), values.shape)] != labels[np.ravel_multi_index((1, 1, 2),
                                                                                              values.shape)]


def test_observed_cluster_table_is_the_one_format_with_fwe_columns() -> None:
    rng = np.random.default_rng(23)
    shape = (8, 8, 4)
    Y = rng.normal(size=(10, int(np.prod(shape))))
    volume = np.zeros(shape, dtype=bool)
    volume[1:4, 1:4, 1:3] = True                       # 18 voxels, positive
    Y[:, volume.ravel()] += 2.0
    negative = np.zeros(shape, dtype=bool)
    negative[5:7, 5:7, 1:3] = True                     # 8 voxels, negative
    Y[:, negative.ravel()] -= 2.0
    affine = np.diag([2.0, 2.0, 3.0, 1.0])
    result = pm.run_permutation_test(np.ones((10, 1)), Y, np.array([1.0]), np.arange(Y.shape[1]), shape,
                                     "sign_flip", 50, seed=1, cluster_threshold=stats.t.isf(0.01, 9))
    table, numbers = pm.observed_cluster_table(result, np.arange(Y.shape[1]), shape, affine, 2, 6.0)
    assert list(table.columns) == clusters.cluster_columns(2, clusters.PERMUTATION_COLUMNS)
    assert np.all(np.diff(table["size_voxels"].to_numpy()) <= 0)             # largest first
    for row in table.itertuples():
        members = numbers == row.cluster_id
        # the row's size, sign and FWE p are those of the permutation result's cluster at the same voxels
        old = np.unique(result.labels[members])
        assert old.size == 1 and members.sum() == row.size_voxels == result.extent[old[0] - 1]
        assert row.p_fwe_extent == result.p_fwe_extent[old[0] - 1] and row.mass == result.mass[old[0] - 1]
        assert np.sign(row.peak_stat) == result.cluster_sign[old[0] - 1]
        assert row.volume_mm3 == pytest.approx(12.0 * row.size_voxels)
