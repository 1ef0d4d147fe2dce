"""Tests of glmsteps.threshold: FDR, Bonferroni, clusters, cluster tables."""

from __future__ import annotations

import numpy as np
import pytest
from nibabel.affines import apply_affine
from scipy import ndimage
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


@pytest.mark.parametrize("connectivity, rank", [(6, 1), (18, 2), (26, 3)])
def test_labels_equal_scipy_ndimage_label(connectivity, rank):
    rng = np.random.default_rng(connectivity)
    mask = rng.uniform(size=(12, 11, 10)) < 0.3
    labels, n = threshold.label_clusters(mask, connectivity)
    # reference: scipy.ndimage.label with generate_binary_structure(3, rank)
    ref, n_ref = ndimage.label(mask, structure=ndimage.generate_binary_structure(3, rank))
    assert n == n_ref
    # same partition (labels are renumbered largest first)
    pairs = set(zip(labels[mask].tolist(), ref[mask].tolist()))
    assert len(pairs) == n_ref
    assert np.all((labels > 0) == mask)
    sizes = np.bincount(labels.ravel())[1:]
    assert np.all(np.diff(sizes) <= 0)


def _blob_volume():
    stat = np.zeros((20, 20, 20))
    stat[2:6, 2:6, 2:6] = 3.0
    stat[3, 3, 3] = 7.0                       # peak of cluster 1
    stat[14:19, 10:18, 10:12] = -4.0
    stat[15, 11, 10] = -9.0                   # peak of the negative cluster
    stat[17, 16, 11] = -6.0                   # a sub-peak, far from the peak
    stat[10, 10, 10] = 5.0                    # single voxel
    return stat


def test_cluster_table_peaks_and_centres_in_world_mm():
    stat = _blob_volume()
    affine = np.array([[-2.0, 0, 0, 90], [0, 2.0, 0, -126], [0, 0, 2.5, -72], [0, 0, 0, 1]])
    labels, n = threshold.label_clusters(stat != 0, 26)
    table = threshold.cluster_table(stat, labels, affine, voxel_volume_mm3=10.0)
    assert list(table.columns) == threshold.cluster_columns(3)
    assert n == 3 and len(table) == 3
    neg = table.iloc[0]                        # 5*8*2 = 80 voxels, largest
    assert neg.size_voxels == 80 and neg.volume_mm3 == 800.0 and neg.peak_stat == -9.0
    # reference: nibabel.affines.apply_affine of the voxel index
    np.testing.assert_allclose([neg.peak_x_mm, neg.peak_y_mm, neg.peak_z_mm], apply_affine(affine, (15, 11, 10)))
    np.testing.assert_allclose([neg.subpeak1_x_mm, neg.subpeak1_y_mm, neg.subpeak1_z_mm],
                               apply_affine(affine, (17, 16, 11)))
    assert neg.subpeak1_stat == -6.0
    idx = np.argwhere(labels == 1)
    np.testing.assert_allclose([neg.centre_x_mm, neg.centre_y_mm, neg.centre_z_mm],
                               apply_affine(affine, idx).mean(axis=0))
    cube = table.iloc[1]
    np.testing.assert_allclose([cube.peak_x_mm, cube.peak_y_mm, cube.peak_z_mm], apply_affine(affine, (3, 3, 3)))
    # every plateau maximum of the cube lies within 8 mm of its peak: no sub-peak
    assert np.isnan(cube.subpeak1_stat)
    single = table.iloc[2]
    assert single.size_voxels == 1 and np.isnan(single.subpeak1_stat)


def test_subpeaks_are_more_than_min_distance_apart():
    rng = np.random.default_rng(7)
    stat = ndimage.gaussian_filter(rng.normal(size=(24, 24, 24)), 1.5)
    stat = np.where(stat > 0, stat, 0)
    labels, _ = threshold.label_clusters(stat > 0, 26)
    affine = np.diag([3.0, 3.0, 3.0, 1.0])
    table = threshold.cluster_table(stat, labels, affine, 27.0, min_distance_mm=8.0)
    for _, row in table.iterrows():
        pts = [(row.peak_x_mm, row.peak_y_mm, row.peak_z_mm)]
        pts += [(row[f"subpeak{k}_x_mm"], row[f"subpeak{k}_y_mm"], row[f"subpeak{k}_z_mm"]) for k in (1, 2, 3)
                if np.isfinite(row[f"subpeak{k}_stat"])]
        for a in range(len(pts)):
            for b in range(a):
                assert np.linalg.norm(np.subtract(pts[a], pts[b])) > 8.0
        # the peak has the largest |stat| of its cluster
        assert abs(row.peak_stat) == pytest.approx(np.abs(stat[labels == row.cluster_id]).max())


def test_empty_table_has_header_only():
    table = threshold.cluster_table(np.zeros((3, 3, 3)), np.zeros((3, 3, 3), int), np.eye(4), 1.0)
    assert len(table) == 0 and list(table.columns) == threshold.cluster_columns(3)


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
                {"method": "cluster_extent", "forming_p": 0.001}):
        with pytest.raises(ConfigError) as info:
            threshold.parse_setting({"name": "x", **bad})
        assert "\n" not in str(info.value) and "'x'" in str(info.value)
