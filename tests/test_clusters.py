"""Tests of glmsteps.clusters: labelling, world-mm peaks and centres, the one cluster table, rounding."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import ndimage

from glmsteps import clusters

# A hand-built oblique, anisotropic voxel-to-world affine: columns of length 2, 3 and 4 mm, the first
# two rotated in plane by atan(4/3) (a 3-4-5 triangle, so every product below is exact in decimals),
# the third tilted towards y. World coordinates, written out by hand:
#   x = 1.2 i - 2.4 j         + 10
#   y = 1.6 i + 1.8 j + 2.4 k - 20
#   z =                 3.2 k +  5
# voxel volume |det| = 3.2 * (1.2 * 1.8 + 2.4 * 1.6) = 3.2 * 6.0 = 19.2 mm^3.
OBLIQUE = np.array([[1.2, -2.4, 0.0, 10.0],
                    [1.6, 1.8, 2.4, -20.0],
                    [0.0, 0.0, 3.2, 5.0],
                    [0.0, 0.0, 0.0, 1.0]])


def _two_clusters() -> np.ndarray:
    stat = np.zeros((12, 10, 8))
    # cluster A (positive, 4 voxels): peak 6.0 at (3, 4, 2)
    stat[3, 4, 2], stat[4, 4, 2], stat[3, 5, 2], stat[3, 4, 3] = 6.0, 4.0, 4.0, 4.5
    # cluster B (negative, 6 voxels along i at j = 1, k = 6): peak -8 at i = 7, a second maximum -5 at i = 2
    stat[2:8, 1, 6] = -3.0
    stat[7, 1, 6], stat[2, 1, 6] = -8.0, -5.0
    return stat


def test_voxel_to_world_by_hand():
    # reference: the hand arithmetic above
    np.testing.assert_allclose(clusters.voxel_to_world(OBLIQUE, (3, 4, 2)), [4.0, -3.2, 11.4], atol=1e-12)
    np.testing.assert_allclose(clusters.voxel_to_world(OBLIQUE, [(7, 1, 6), (2, 1, 6)]),
                               [[16.0, 7.4, 24.2], [10.0, -0.6, 24.2]], atol=1e-12)
    assert clusters.voxel_volume_mm3(OBLIQUE) == pytest.approx(19.2, rel=1e-12)


def test_cluster_table_peaks_centres_and_subpeaks_by_hand():
    stat = _two_clusters()
    labels, n = clusters.label_signed(stat > 0, stat < 0, 26)
    assert n == 2
    table = clusters.cluster_table(stat, labels, OBLIQUE, subpeaks=2, subpeak_spacing_mm=8.0)
    assert list(table.columns) == clusters.cluster_columns(2)
    b, a = table.iloc[0], table.iloc[1]                # B is larger, so it is cluster 1
    assert (b.cluster_id, b.size_voxels, a.cluster_id, a.size_voxels) == (1, 6, 2, 4)
    # reference: hand arithmetic with the affine written out above
    assert b.volume_mm3 == pytest.approx(6 * 19.2) and a.volume_mm3 == pytest.approx(4 * 19.2)
    assert b.peak_stat == -8.0 and (b.peak_i, b.peak_j, b.peak_k) == (7, 1, 6)
    np.testing.assert_allclose([b.peak_x_mm, b.peak_y_mm, b.peak_z_mm], [16.0, 7.4, 24.2], atol=1e-9)
    # centre of B: mean voxel (4.5, 1, 6) -> x = 5.4 - 2.4 + 10, y = 7.2 + 1.8 + 14.4 - 20, z = 19.2 + 5
    np.testing.assert_allclose([b.centre_x_mm, b.centre_y_mm, b.centre_z_mm], [13.0, 3.4, 24.2], atol=1e-9)
    # the second maximum of B, 5 voxels along the 2 mm column from the peak: (6.0, 8.0, 0) -> 10 mm away
    assert b.subpeak1_stat == -5.0
    np.testing.assert_allclose([b.subpeak1_x_mm, b.subpeak1_y_mm, b.subpeak1_z_mm], [10.0, -0.6, 24.2], atol=1e-9)
    assert np.isnan(b.subpeak2_stat)                   # the plateau voxels lie within 8 mm of a kept peak
    assert a.peak_stat == 6.0
    np.testing.assert_allclose([a.peak_x_mm, a.peak_y_mm, a.peak_z_mm], [4.0, -3.2, 11.4], atol=1e-9)
    # centre of A: mean voxel (3.25, 4.25, 2.25) -> x = 3.9 - 10.2 + 10, y = 5.2 + 7.65 + 5.4 - 20, z = 7.2 + 5
    np.testing.assert_allclose([a.centre_x_mm, a.centre_y_mm, a.centre_z_mm], [3.7, -1.75, 12.2], atol=1e-9)
    assert np.isnan(a.subpeak1_stat)
    # 12 mm spacing (the default): B's second maximum, 10 mm from its peak, is no longer a sub-peak
    wide = clusters.cluster_table(stat, labels, OBLIQUE)
    assert clusters.DEFAULT_SUBPEAK_SPACING_MM == 12.0 and np.isnan(wide.iloc[0].subpeak1_stat)


@pytest.mark.parametrize("connectivity, rank", [(6, 1), (18, 2), (26, 3)])
def test_labels_equal_scipy_ndimage_label(connectivity, rank):
    rng = np.random.default_rng(connectivity)
    mask = rng.uniform(size=(12, 11, 10)) < 0.3
    labels, n = clusters.label_mask(mask, connectivity)
    # reference: scipy.ndimage.label with generate_binary_structure(3, rank)
    ref, n_ref = ndimage.label(mask, structure=ndimage.generate_binary_structure(3, rank))
    assert n == n_ref
    pairs = set(zip(labels[mask].tolist(), ref[mask].tolist()))   # the same partition, renumbered
    assert len(pairs) == n_ref
    assert np.all((labels > 0) == mask)
    sizes = np.bincount(labels.ravel())[1:]
    assert np.all(np.diff(sizes) <= 0)


def test_positive_and_negative_voxels_never_join():
    stat = np.zeros((5, 5, 5))
    stat[1, 1, 1], stat[1, 1, 2] = 3.0, -3.0           # face neighbours of opposite sign
    labels, n = clusters.label_signed(stat > 0, stat < 0, 6)
    assert n == 2 and labels[1, 1, 1] != labels[1, 1, 2]


def test_grid_labelling_equals_full_labelling():
    rng = np.random.default_rng(3)
    shape = (9, 8, 7)
    values = ndimage.gaussian_filter(rng.normal(size=shape), 1.0)
    inside = np.flatnonzero(rng.uniform(size=shape).ravel() < 0.8)
    grid = clusters.make_spatial_grid(inside, shape, 18)
    labels, extent, mass = clusters.cluster_extent_mass(values.ravel()[inside], 0.1, grid)
    full = np.zeros(shape, dtype=bool)
    full.ravel()[inside] = values.ravel()[inside] > 0.1
    # reference: scipy.ndimage.label on the whole grid with the 18-neighbourhood
    ref, n_ref = ndimage.label(full, structure=ndimage.generate_binary_structure(3, 2))
    assert extent.size == n_ref
    assert sorted(extent.tolist()) == sorted(np.bincount(ref.ravel())[1:].tolist())
    np.testing.assert_allclose(sorted(mass), sorted(ndimage.sum(values, ref, np.arange(1, n_ref + 1))))


def test_subpeaks_are_more_than_their_spacing_apart():
    rng = np.random.default_rng(7)
    stat = ndimage.gaussian_filter(rng.normal(size=(24, 24, 24)), 1.5)
    stat = np.where(stat > 0, stat, 0)
    labels, _ = clusters.label_mask(stat > 0, 26)
    table = clusters.cluster_table(stat, labels, OBLIQUE, subpeaks=5, subpeak_spacing_mm=9.0)
    for _, row in table.iterrows():
        pts = [(row.peak_x_mm, row.peak_y_mm, row.peak_z_mm)]
        pts += [(row[f"subpeak{k}_x_mm"], row[f"subpeak{k}_y_mm"], row[f"subpeak{k}_z_mm"]) for k in range(1, 6)
                if np.isfinite(row[f"subpeak{k}_stat"])]
        for i in range(len(pts)):
            for j in range(i):
                assert np.linalg.norm(np.subtract(pts[i], pts[j])) > 9.0
        # the peak has the largest |stat| of its cluster
        assert abs(row.peak_stat) == pytest.approx(np.abs(stat[labels == row.cluster_id]).max())


def test_empty_table_has_header_only():
    table = clusters.cluster_table(np.zeros((3, 3, 3)), np.zeros((3, 3, 3), int), np.eye(4))
    assert len(table) == 0 and list(table.columns) == clusters.cluster_columns(clusters.DEFAULT_SUBPEAKS)


def test_rounding_keeps_a_tenth_of_a_millimetre_and_three_significant_digits():
    table = pd.DataFrame({"cluster_id": [1, 2], "size_voxels": [12, 3], "volume_mm3": [230.4444, 19.25],
                          "peak_stat": [7.12345, -0.000123456], "peak_x_mm": [16.04, -3.25001],
                          "subpeak1_stat": [np.nan, 12345.6], "mass": [88.888, 3.0],
                          "p_fwe_extent": [0.0123456, 1.0]})
    out = clusters.round_cluster_table(table)
    # reference: hand rounding (0.1 mm, 3 significant digits)
    assert out["volume_mm3"].tolist() == [230.4, 19.2]
    assert out["peak_x_mm"].tolist() == [16.0, -3.3]
    assert out["peak_stat"].tolist() == [7.12, -0.000123]
    assert np.isnan(out["subpeak1_stat"][0]) and out["subpeak1_stat"][1] == 12300.0
    assert out["mass"].tolist() == [88.9, 3.0] and out["p_fwe_extent"].tolist() == [0.0123, 1.0]
    assert out["cluster_id"].tolist() == [1, 2] and out["size_voxels"].dtype == table["size_voxels"].dtype
