"""Slice mosaics: a map over its underlay on a grid of axial slices, as one RGB image.

The mosaic is composed with numpy (no figure layout), so drawing one costs a few
milliseconds; labels, slice positions and the colour scale are left to the page
that shows it (the study report writes them as HTML beside the image).

Layout: the volumes are first turned to the axis order and directions of RAS+
(the closest axes of the affine), so that in every tile the subject's left is
on the image's left and anterior is at the top; tiles run from inferior
(top-left) to superior (bottom-right). Values are not resampled, only
reordered; voxels are repeated into square-ish pixels by their sizes.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from matplotlib.colors import LinearSegmentedColormap

from ..fileio import atomic_path

#: Background of the tiles (outside the underlay).
BACKGROUND = "#10151b"
#: Gap between tiles.
GAP_COLOUR = "#f6f4ee"
#: Underlay ramp: low to high signal.
UNDERLAY_CMAP = LinearSegmentedColormap.from_list("glmsteps_underlay", ["#1e252d", "#6b6f70", "#d8d2c4"])
#: Positive values, from the display threshold (deep ember) to the largest (pale gold).
POSITIVE_CMAP = LinearSegmentedColormap.from_list("glmsteps_positive", ["#a8321a", "#d9633a", "#f2b880", "#fff1c9"])
#: Negative values, from the display threshold (deep teal) to the most negative (pale mint).
NEGATIVE_CMAP = LinearSegmentedColormap.from_list("glmsteps_negative", ["#17545b", "#3f8f8c", "#9cc5c0", "#e6f5f1"])
#: Target width of one tile in pixels (voxels are repeated up to it).
TILE_PIXELS = 120


@dataclass(frozen=True)
class Mosaic:
    """A composed mosaic.

    Attributes
    ----------
    rgb : ndarray of uint8, shape (height, width, 3)
    slice_mm : tuple of float
        World z (mm, RAS+) of each tile's slice, tile order.
    columns : int
        Tiles per row.
    vmin, vmax : float
        Smallest and largest absolute value shown in colour (NaN when none).
    signed : bool
        Negative values present (teal ramp used).
    n_coloured : int
        Voxels shown in colour over all tiles.
    tile_px : tuple of 2 int
        Height and width of one tile in pixels (tiles are 2 pixels apart).
    """

    rgb: npt.NDArray[np.uint8]
    slice_mm: tuple[float, ...]
    columns: int
    vmin: float
    vmax: float
    signed: bool
    n_coloured: int
    tile_px: tuple[int, int] = (0, 0)

    def tile(self, n: int) -> npt.NDArray[np.uint8]:
        """The pixels of tile ``n`` (0-based, row by row)."""
        th, tw = self.tile_px
        r, c = divmod(n, self.columns)
        return self.rgb[r * (th + 2):r * (th + 2) + th, c * (tw + 2):c * (tw + 2) + tw]


def to_ras(data: npt.NDArray[np.floating], affine: npt.NDArray[np.floating]
           ) -> tuple[npt.NDArray[np.floating], npt.NDArray[np.float64]]:
    """Reorder a 3D array's axes (and flip them) to the closest RAS+ orientation.

    Parameters
    ----------
    data : ndarray, shape (nx, ny, nz)
    affine : ndarray, shape (4, 4)
        Voxel to world (mm).

    Returns
    -------
    (data, affine)
        The reordered array and its voxel-to-world affine.
    """
    from nibabel.orientations import apply_orientation, inv_ornt_aff, io_orientation

    ornt = io_orientation(np.asarray(affine, dtype=np.float64))
    out = apply_orientation(np.asarray(data), ornt)
    new_affine = np.asarray(affine, dtype=np.float64) @ inv_ornt_aff(ornt, np.asarray(data).shape)
    return out, new_affine


def choose_slices(extent: npt.NDArray[np.bool_], n_slices: int) -> list[int]:
    """``n_slices`` axial slice indices spread evenly over the slices that hold the volume.

    Parameters
    ----------
    extent : ndarray of bool, shape (nx, ny, nz)
        Where the underlay (brain) is.
    n_slices : int
        At most this many (fewer when the volume has fewer slices).

    Returns
    -------
    list of int, increasing

    Examples
    --------
    >>> m = np.zeros((2, 2, 10), bool); m[..., 2:8] = True
    >>> choose_slices(m, 3)
    [3, 5, 7]
    """
    occupied = np.flatnonzero(extent.any(axis=(0, 1)))
    if not occupied.size:
        occupied = np.arange(extent.shape[2])
    lo, hi = int(occupied[0]), int(occupied[-1])
    count = min(n_slices, hi - lo + 1)
    # centres of count equal parts of [lo, hi + 1): avoids the (often nearly empty) end slices
    centres = lo + (np.arange(count) + 0.5) * (hi - lo + 1) / count
    return sorted({int(c) for c in np.floor(centres)})


def _rgb(cmap: LinearSegmentedColormap, t: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    return np.asarray(cmap(np.clip(t, 0.0, 1.0)))[..., :3]


def _hex_rgb(colour: str) -> npt.NDArray[np.float64]:
    return np.array([int(colour[i:i + 2], 16) / 255.0 for i in (1, 3, 5)])


def compose_mosaic(underlay: npt.NDArray[np.floating], overlay: npt.NDArray[np.floating] | None,
                   affine: npt.NDArray[np.floating], n_slices: int = 12, columns: int = 6,
                   vmin: float | None = None) -> Mosaic:
    """Compose a map over its underlay on axial slices.

    Parameters
    ----------
    underlay : ndarray, shape (nx, ny, nz)
        Background (e.g. the temporal mean image); NaN and values <= 0 are background.
    overlay : ndarray, shape (nx, ny, nz), optional
        Map shown in colour where finite and non-zero with ``|value| >= vmin``.
    affine : ndarray, shape (4, 4)
        Voxel to world (mm) of both.
    n_slices : int
        Tiles (at most).
    columns : int
        Tiles per row.
    vmin : float, optional
        Smallest absolute value shown; by default the smallest non-zero absolute
        value (a thresholded map's threshold).

    Returns
    -------
    Mosaic
    """
    under, ras = to_ras(np.asarray(underlay, dtype=np.float64), affine)
    over = None if overlay is None else to_ras(np.asarray(overlay, dtype=np.float64), affine)[0]
    if over is not None and over.shape != under.shape:
        raise ValueError(f"overlay shape {over.shape} differs from the underlay's {under.shape}")
    inside = np.isfinite(under) & (under > 0)
    slices = choose_slices(inside, n_slices)
    lo, hi = np.percentile(under[inside], [2.0, 98.0]) if inside.any() else (0.0, 1.0)
    span = hi - lo if hi > lo else 1.0
    shown = np.zeros(under.shape, dtype=bool)
    if over is not None:
        shown = np.isfinite(over) & (over != 0)
    magnitudes = np.abs(over[shown]) if over is not None else np.zeros(0)
    low = float(vmin) if vmin is not None else (float(magnitudes.min()) if magnitudes.size else float("nan"))
    if over is not None and vmin is not None:
        shown &= np.abs(np.nan_to_num(over)) >= low
        magnitudes = np.abs(over[shown])
    high = float(magnitudes.max()) if magnitudes.size else float("nan")
    signed = bool(over is not None and (over[shown] < 0).any())
    zooms = np.sqrt((ras[:3, :3] ** 2).sum(axis=0))
    pixels_per_mm = TILE_PIXELS / max(under.shape[0] * zooms[0], under.shape[1] * zooms[1])
    rep_x = max(1, int(round(pixels_per_mm * zooms[0])))
    rep_y = max(1, int(round(pixels_per_mm * zooms[1])))
    background, gap = _hex_rgb(BACKGROUND), _hex_rgb(GAP_COLOUR)
    # every tile at once: (n_tiles, ny, nx), rows anterior (high y) first, columns left (low x) first
    pick = np.asarray(slices)
    u = np.transpose(under[:, ::-1, pick], (2, 1, 0))
    stack = np.where(np.transpose(inside[:, ::-1, pick], (2, 1, 0))[..., None], _rgb(UNDERLAY_CMAP, (u - lo) / span),
                     background)
    if over is not None:
        o = np.transpose(over[:, ::-1, pick], (2, 1, 0))
        s = np.transpose(shown[:, ::-1, pick], (2, 1, 0))
        t = (np.abs(np.nan_to_num(o)) - low) / (high - low) if high > low else np.ones(o.shape)
        stack = np.where((s & (o > 0))[..., None], _rgb(POSITIVE_CMAP, t), stack)
        stack = np.where((s & (o < 0))[..., None], _rgb(NEGATIVE_CMAP, t), stack)
    stack = np.repeat(np.repeat(stack, rep_y, axis=1), rep_x, axis=2)
    tiles = list(stack)
    columns = max(1, min(columns, len(tiles)))
    rows = -(-len(tiles) // columns)
    th, tw = tiles[0].shape[:2]
    pad = 2
    canvas = np.empty((rows * th + (rows - 1) * pad, columns * tw + (columns - 1) * pad, 3))
    canvas[:] = gap
    for n, tile in enumerate(tiles):
        r, c = divmod(n, columns)
        canvas[r * (th + pad):r * (th + pad) + th, c * (tw + pad):c * (tw + pad) + tw] = tile
    for n in range(len(tiles), rows * columns):  # empty tiles of the last row
        r, c = divmod(n, columns)
        canvas[r * (th + pad):r * (th + pad) + th, c * (tw + pad):c * (tw + pad) + tw] = gap
    world_z = [float((ras @ np.array([0.0, 0.0, k, 1.0]))[2]) for k in slices]
    return Mosaic(rgb=np.round(canvas * 255).astype(np.uint8), slice_mm=tuple(world_z), columns=columns,
                  vmin=low, vmax=high, signed=signed, n_coloured=int(shown[:, :, slices].sum()),
                  tile_px=(int(th), int(tw)))


def save_png(path: str | os.PathLike[str], rgb: npt.NDArray[np.uint8]) -> None:
    """Write an RGB image as PNG atomically."""
    from matplotlib.image import imsave

    with atomic_path(path) as tmp:
        imsave(tmp, rgb, format="png")


def gradient_stops(cmap: LinearSegmentedColormap, n: int = 6) -> list[str]:
    """``n`` evenly spaced colours of a colour map as ``#rrggbb`` (for a CSS gradient)."""
    out = []
    for x in np.linspace(0.0, 1.0, n):
        r, g, b = (int(round(255 * c)) for c in cmap(float(x))[:3])
        out.append(f"#{r:02x}{g:02x}{b:02x}")
    return out
