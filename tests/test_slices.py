"""Tests of glmsteps.plots.slices: side labels, orientation and the two-sided colour bar."""

from __future__ import annotations

import numpy as np
import pytest

from glmsteps.plots.slices import SIDE_LABELS, plot_orthogonal_slices, to_world_axes

SHAPE = (20, 16, 12)
# The same 2 mm grid stored two ways: x increasing with i (RAS) and x decreasing with i (LAS).
RAS = np.array([[2.0, 0, 0, -19.0], [0, 2.0, 0, -15.0], [0, 0, 2.0, -11.0], [0, 0, 0, 1]])
LAS = np.array([[-2.0, 0, 0, 19.0], [0, 2.0, 0, -15.0], [0, 0, 2.0, -11.0], [0, 0, 0, 1]])


def _marker_on_the_left(affine: np.ndarray) -> tuple[np.ndarray, tuple[int, int, int]]:
    """A stat map with one positive voxel at world x = -15 mm (the subject's left), y = z = 1 mm."""
    ijk = np.rint(np.linalg.solve(affine, [-15.0, 1.0, 1.0, 1.0])[:3]).astype(int)
    stat = np.zeros(SHAPE)
    stat[tuple(ijk)] = 4.0
    return stat, tuple(int(v) for v in ijk)


@pytest.mark.parametrize("affine", [RAS, LAS], ids=["RAS", "LAS"])
def test_the_subjects_left_is_on_the_left_of_the_coronal_and_axial_panels(affine):
    stat, ijk = _marker_on_the_left(affine)
    fig = plot_orthogonal_slices(np.ones(SHAPE), stat, affine, ijk, "test")
    for ax in fig.axes[1:3]:                                  # coronal, axial
        shown = np.asarray(ax.images[1].get_array().filled(np.nan))
        rows, cols = np.nonzero(np.isfinite(shown))
        # world x = -15 mm is 2 voxels from the left edge x = -19 mm of the 40 mm wide grid (by hand)
        assert cols.tolist() == [2]
        texts = sorted((t.get_position()[0], t.get_text()) for t in ax.texts if t.get_position()[1] == 0.5)
        assert [t for _, t in texts] == ["L", "R"]
    sag = sorted((t.get_position()[0], t.get_text()) for t in fig.axes[0].texts if t.get_position()[1] == 0.5)
    assert [t for _, t in sag] == list(SIDE_LABELS["sagittal"][:2])


def test_world_axes_keep_world_coordinates():
    data = np.arange(np.prod(SHAPE), dtype=float).reshape(SHAPE)
    turned, affine = to_world_axes(data, LAS)
    # reference: hand arithmetic, voxel (3, 4, 5) of the LAS grid is x = 19 - 6 = 13 mm, y = -7, z = -1
    xyz = np.array([13.0, -7.0, -1.0])
    new = np.rint(np.linalg.solve(affine, [*xyz, 1.0])[:3]).astype(int)
    assert turned[tuple(new)] == data[3, 4, 5]
    assert np.all(np.diag(affine)[:3] > 0)


@pytest.mark.parametrize("values", [(3.0, 5.0), (-6.0, 2.5)], ids=["positive only", "both signs"])
def test_colour_bar_is_two_sided_and_centred_on_zero(values):
    stat = np.zeros(SHAPE)
    stat[5, 5, 5], stat[6, 6, 6] = values
    fig = plot_orthogonal_slices(np.ones(SHAPE), stat, RAS, (5, 5, 5), "test")
    norm = fig.axes[0].images[1].norm
    top = max(abs(v) for v in values)
    assert (norm.vmin, norm.vmax) == (-top, top)
    bar = fig.axes[-1]
    assert list(bar.get_yticks()) == [-top, 0.0, top]
