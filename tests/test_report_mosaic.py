"""The slice mosaic: orientation (left on the left, anterior up), colouring, slice choice, PNG output."""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.image import imread
from nibabel.affines import apply_affine

from glmsteps.plots import mosaic as mz

SHAPE = (10, 12, 8)
RAS = np.array([[2.0, 0, 0, -10], [0, 2.0, 0, -12], [0, 0, 2.0, -8], [0, 0, 0, 1]])


def _volumes():
    under = np.zeros(SHAPE)
    under[1:-1, 1:-1, 1:-1] = 100.0
    over = np.zeros(SHAPE)
    over[2, 9, 4] = 5.0          # left (low x) and anterior (high y)
    return under, over


def _coloured(m: mz.Mosaic, plain: mz.Mosaic, n: int) -> np.ndarray:
    """Pixels of tile n that the overlay changed (against the same mosaic without overlay)."""
    return (m.tile(n) != plain.tile(n)).any(axis=-1)


def test_left_is_left_and_anterior_is_up():
    under, over = _volumes()
    m = mz.compose_mosaic(under, over, RAS, n_slices=8, columns=8)
    # reference: the voxel's world position by the affine (nibabel.affines.apply_affine)
    x, y, z = apply_affine(RAS, [2, 9, 4])
    assert x < 0 and y > 0
    plain = mz.compose_mosaic(under, None, RAS, n_slices=8, columns=8)
    th, tw = m.tile_px
    rows, cols = np.nonzero(_coloured(m, plain, [round(s) for s in m.slice_mm].index(round(z))))
    assert rows.size > 0
    assert cols.max() < tw / 2          # left half: the subject's left
    assert rows.max() < th / 2          # top half: anterior
    assert m.n_coloured == 1
    # no other tile shows it
    others = [n for n in range(len(m.slice_mm)) if round(m.slice_mm[n]) != round(z)]
    assert not any(_coloured(m, plain, n).any() for n in others)


def test_a_flipped_affine_gives_the_same_picture():
    """The same world image stored left-right flipped (LPS-like x axis) is drawn identically."""
    under, over = _volumes()
    lps = RAS.copy()
    lps[0, 0] = -2.0
    lps[0, 3] = 8.0              # voxel i of the flipped array sits where voxel 9 - i did
    a = mz.compose_mosaic(under, over, RAS, n_slices=8)
    b = mz.compose_mosaic(under[::-1], over[::-1], lps, n_slices=8)
    assert np.array_equal(a.rgb, b.rgb)
    assert a.slice_mm == b.slice_mm


def test_colour_scale_threshold_and_sign():
    under, over = _volumes()
    over[5, 5, 4] = -7.0
    over[6, 5, 4] = 0.5
    m = mz.compose_mosaic(under, over, RAS, n_slices=8, vmin=1.0)
    assert m.signed and m.vmin == 1.0 and m.vmax == 7.0
    assert m.n_coloured == 2      # 0.5 is below the display threshold
    plain = mz.compose_mosaic(under, None, RAS, n_slices=8)
    assert plain.n_coloured == 0 and np.isnan(plain.vmax)


def test_slices_span_the_volume():
    extent = np.zeros((4, 4, 30), dtype=bool)
    extent[..., 5:25] = True
    assert mz.choose_slices(extent, 4) == [7, 12, 17, 22]
    assert mz.choose_slices(extent, 100) == list(range(5, 25))


def test_png_round_trip(tmp_path):
    under, over = _volumes()
    m = mz.compose_mosaic(under, over, RAS, n_slices=5, columns=3)
    path = tmp_path / "m.png"
    mz.save_png(path, m.rgb)
    back = imread(path)
    assert back.shape[:2] == m.rgb.shape[:2]
    assert np.array_equal(np.round(back[..., :3] * 255).astype(np.uint8), m.rgb)


def test_shape_mismatch_is_an_error():
    under, over = _volumes()
    with pytest.raises(ValueError):
        mz.compose_mosaic(under, over[:-1], RAS)
