"""Tests of glmsteps.threshold: FDR, Bonferroni, clusters, cluster tables."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as sps

from glmsteps import threshold
from glmsteps.errors import ConfigError

# from memory: the 15 p-values of the worked example in Benjamini & Hochberg (1995), sec. 4.
BH1995_P = [0.0201, 0.0001, 0.0004, 0.0019, 0.0095, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262, 0.5719,
            0.6528, 0.7590, 1.0000]


def test_fdr_worked_example_rejects_four_smallest():
    # reference: Benjamini & Hochberg (1995) worked example, q = 0.05 rejects the 4 smallest (from memory)
    cutoff = threshold.fdr_threshold(BH1995_P, 0.05)
    rejected = np.asarray(BH1995_P) <= cutoff
    assert sorted(np.asarray(BH1995_P)[rejected]) == [0.0001, 0.0004, 0.0019, 0.0095]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_fdr_matches_scipy_false_discovery_control(seed):
    rng = np.random.default_rng(seed)
    p = np.concatenate([rng.uniform(size=900), rng.uniform(0, 1e-3, size=100)])
    for q in (0.01, 0.05, 0.2):
        # reference: scipy.stats.false_discovery_control (Benjamini-Hochberg adjusted p-values)
        expected = sps.false_discovery_control(p, method="bh") <= q
        np.testing.assert_array_equal(p <= threshold.fdr_threshold(p, q), expected)


def test_fdr_nothing_rejected_and_nan_ignored():
    assert np.isnan(threshold.fdr_threshold([0.5, 0.9, np.nan], 0.05))
    # NaN entries are not tests: m = 2 here
    assert threshold.fdr_threshold([0.02, 0.04, np.nan], 0.05) == 0.04


def test_bonferroni():
    # reference: Dunn (1961), alpha / m
    assert threshold.bonferroni_threshold(200, 0.05) == pytest.approx(0.05 / 200)


def test_threshold_map_methods():
    rng = np.random.default_rng(8)
    z = rng.normal(size=(10, 10, 10))
    z[1:4, 1:4, 1:4] = 6.0
    z[6:8, 6:8, 6:8] = -6.0
    z[0, 0, 0] = np.nan
    p = 2 * sps.norm.sf(np.abs(z))
    setting = threshold.parse_setting({"name": "fwe", "method": "bonferroni", "alpha": 0.05})
    res = threshold.threshold_map(z, p, setting)
    # reference: Dunn (1961) Bonferroni over the 999 finite voxels
    np.testing.assert_array_equal(res.mask, np.nan_to_num(p, nan=1.0) <= 0.05 / 999)
    assert res.n_tests == 999 and res.n_clusters == 2
    pos = threshold.threshold_map(z, p, threshold.parse_setting(
        {"name": "c", "method": "cluster_extent", "forming_p": 0.01, "min_cluster_voxels": 10, "tail": "positive"}))
    assert pos.n_clusters == 1 and pos.mask[2, 2, 2] and not pos.mask[7, 7, 7]
    none = threshold.threshold_map(np.zeros((3, 3, 3)), np.ones((3, 3, 3)),
                                   threshold.parse_setting({"name": "q", "method": "fdr", "q": 0.05}))
    assert none.n_clusters == 0 and none.p_cutoff is None and "no voxel survived" in none.note


def test_bad_settings_are_one_line_config_errors():
    for bad in ({"method": "fdr"}, {"method": "fdr", "q": 2}, {"method": "magic"},
                {"method": "fdr", "q": 0.05, "connectivity": 8}, {"method": "fdr", "q": 0.05, "min_cluster_voxels": 3},
                {"method": "cluster_extent", "forming_p": 0.001}, {"method": "fdr", "q": 0.05, "subpeaks": -1},
                {"method": "fdr", "q": 0.05, "subpeaks": 21}, {"method": "fdr", "q": 0.05, "subpeak_spacing_mm": 0}):
        with pytest.raises(ConfigError) as info:
            threshold.parse_setting({"name": "x", **bad})
        assert "\n" not in str(info.value) and "'x'" in str(info.value)


def _signed_blobs():
    """A positive and a negative blob of equal strength in null noise (z map, two-sided p)."""
    rng = np.random.default_rng(12)
    z = rng.normal(size=(16, 16, 10))
    z[2:6, 2:6, 2:5] = 5.0
    z[9:13, 9:13, 5:8] = -5.0
    return z, 2 * sps.norm.sf(np.abs(z))


@pytest.mark.parametrize("map_tail", ["two-sided", "positive", "negative"])
@pytest.mark.parametrize("tail", ["two-sided", "positive", "negative"])
def test_p_for_tail_gives_the_threshold_tail_whatever_the_map_tail(map_tail, tail):
    z, _ = _signed_blobs()
    # reference: scipy.stats.norm, the p of each tail of a standard normal z
    by_tail = {"positive": sps.norm.sf(z), "negative": sps.norm.cdf(z), "two-sided": 2 * sps.norm.sf(np.abs(z))}
    p, source = threshold.p_for_tail(z, by_tail[map_tail], "t", map_tail, tail)
    np.testing.assert_allclose(p, by_tail[tail], rtol=1e-10)
    assert source.startswith("p map") == (map_tail == tail)


def test_p_for_tail_keeps_f_maps_and_unknown_tails():
    z, p = _signed_blobs()
    np.testing.assert_array_equal(threshold.p_for_tail(z, p, "F", None, "positive")[0], p)
    np.testing.assert_array_equal(threshold.p_for_tail(z, p, None, None, "negative")[0], p)


@pytest.mark.parametrize("method", [{"method": "fdr", "q": 0.05}, {"method": "bonferroni", "alpha": 0.05},
                                    {"method": "cluster_extent", "forming_p": 0.001, "min_cluster_voxels": 5}])
def test_each_tail_keeps_the_blobs_of_its_sign(method):
    z, _ = _signed_blobs()
    kept = {}
    for tail in ("two-sided", "positive", "negative"):
        setting = threshold.parse_setting({"name": "x", **method, "tail": tail})
        p, _ = threshold.p_for_tail(z, 2 * sps.norm.sf(np.abs(z)), "t", "two-sided", tail)
        kept[tail] = threshold.threshold_map(z, p, setting).mask
    # planted by hand: the positive blob at [2:6, 2:6, 2:5], the negative one at [9:13, 9:13, 5:8]
    assert kept["two-sided"][3, 3, 3] and kept["two-sided"][10, 10, 6]
    assert kept["positive"][3, 3, 3] and not kept["positive"][10, 10, 6]
    assert kept["negative"][10, 10, 6] and not kept["negative"][3, 3, 3]
    assert not np.any(kept["positive"] & (z < 0)) and not np.any(kept["negative"] & (z > 0))
