"""Orthogonal slices of a thresholded map over an underlay, in the house style.

The volumes are first turned to the voxel axes closest to world x, y, z
(right, anterior, superior; ``nibabel.orientations``), whatever the order and
direction the file stores them in, so that every panel is shown the same way
and labelled with the subject's sides: the sagittal panel with posterior (P)
left and anterior (A) right, the coronal and axial panels with the subject's
left (L) on the left of the panel and right (R) on the right, superior up.
Values share one two-sided colour bar centred on 0 (``SIGNED_CMAP`` from -m
to +m, m the largest magnitude shown), so zero has the same colour in every
figure and both signs the same scale, whether the map has one sign or both.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt
from matplotlib import colors
from nibabel import orientations

from .style import INK, SIGNED_CMAP, new_figure

#: Side labels of each panel: (left edge, right edge, bottom edge, top edge).
SIDE_LABELS: dict[str, tuple[str, str, str, str]] = {
    "sagittal": ("P", "A", "I", "S"),
    "coronal": ("L", "R", "I", "S"),
    "axial": ("L", "R", "P", "A"),
}


def to_world_axes(volume: npt.NDArray[Any], affine: npt.ArrayLike) -> tuple[npt.NDArray[Any], npt.NDArray[np.float64]]:
    """The volume with its axes permuted and flipped to the closest of +x, +y, +z (RAS), and its affine.

    Parameters
    ----------
    volume : ndarray, shape (nx, ny, nz)
    affine : array_like, shape (4, 4)

    Returns
    -------
    data : ndarray
        Axis 0 runs towards the subject's right, axis 1 anterior, axis 2 superior.
    affine : ndarray, shape (4, 4)
        Voxel-to-world transform of ``data`` (same world coordinates).
    """
    affine = np.asarray(affine, dtype=np.float64)
    start = orientations.io_orientation(affine)
    change = orientations.ornt_transform(start, orientations.axcodes2ornt(("R", "A", "S")))
    data = orientations.apply_orientation(np.asarray(volume), change)
    new_affine = affine @ orientations.inv_ornt_aff(change, np.asarray(volume).shape)
    return data, new_affine


def plot_orthogonal_slices(underlay3d: npt.NDArray[np.floating], stat3d: npt.NDArray[np.floating],
                           affine: npt.NDArray[np.floating], centre_ijk: tuple[int, int, int],
                           title: str, colour_label: str = "z") -> Any:
    """Three orthogonal slices through a voxel: stat (non-zero voxels) over the underlay.

    Parameters
    ----------
    underlay3d : ndarray, shape (nx, ny, nz)
        Background image (e.g. the temporal mean), shown in grey.
    stat3d : ndarray, shape (nx, ny, nz)
        Map to overlay; 0 and NaN are transparent.
    affine : ndarray, shape (4, 4)
        Voxel-to-world transform (mm) of both volumes.
    centre_ijk : tuple of 3 int
        Voxel (in the stored order) the slices pass through (the peak).
    title : str
    colour_label : str
        Colour bar label.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Panels: sagittal (x fixed), coronal (y fixed) and axial (z fixed), in the
    orientation of the module docstring, with the world coordinate of each
    plane in its title and the panel aspect from the voxel sizes.
    """
    affine = np.asarray(affine, dtype=np.float64)
    world = affine @ np.array([*centre_ijk, 1.0])
    under, ras_affine = to_world_axes(np.nan_to_num(np.asarray(underlay3d, dtype=np.float64), nan=0.0), affine)
    stat, _ = to_world_axes(np.asarray(stat3d, dtype=np.float64), affine)
    i, j, k = (int(v) for v in np.clip(np.rint(np.linalg.solve(ras_affine, world)[:3]), 0,
                                       np.array(under.shape) - 1))
    over = np.where(np.isfinite(stat) & (stat != 0), stat, np.nan)
    zooms = np.sqrt((ras_affine[:3, :3] ** 2).sum(axis=0))
    finite = over[np.isfinite(over)]
    vmax = float(np.abs(finite).max()) if finite.size else 1.0
    norm = colors.Normalize(vmin=-vmax, vmax=vmax)           # two-sided, centred on 0
    lo, hi = np.percentile(under[under > 0], [2, 98]) if (under > 0).any() else (0.0, 1.0)
    planes = [
        ("sagittal", f"x = {world[0]:.0f} mm", under[i, :, :], over[i, :, :], zooms[2] / zooms[1]),
        ("coronal", f"y = {world[1]:.0f} mm", under[:, j, :], over[:, j, :], zooms[2] / zooms[0]),
        ("axial", f"z = {world[2]:.0f} mm", under[:, :, k], over[:, :, k], zooms[1] / zooms[0]),
    ]
    fig, axes = new_figure(9.0, 3.4, ncols=3)
    image = None
    for ax, (view, label, u, o, aspect) in zip(axes, planes):
        # rot90 puts the plane's first axis left to right and its second bottom to top
        ax.imshow(np.rot90(u), cmap="gray", vmin=lo, vmax=hi if hi > lo else lo + 1, aspect=aspect,
                  interpolation="nearest")
        image = ax.imshow(np.rot90(o), cmap=SIGNED_CMAP, norm=norm, aspect=aspect, interpolation="nearest")
        ax.set_title(f"{view}  {label}", color=INK)
        left, right, bottom, top = SIDE_LABELS[view]
        for text, x, y, ha, va in ((left, 0.02, 0.5, "left", "center"), (right, 0.98, 0.5, "right", "center"),
                                   (bottom, 0.5, 0.02, "center", "bottom"), (top, 0.5, 0.98, "center", "top")):
            ax.text(x, y, text, transform=ax.transAxes, ha=ha, va=va, color="white", fontsize=8,
                    fontweight="bold")
        ax.set_xticks([])
        ax.set_yticks([])
        for spine in ax.spines.values():
            spine.set_visible(False)
    fig.suptitle(title, color=INK, fontsize=9, fontweight="bold", y=1.06)
    bar = fig.colorbar(image, ax=list(axes), fraction=0.025, pad=0.02)
    bar.set_ticks([-vmax, 0.0, vmax])
    bar.set_label(colour_label, color=INK)
    bar.outline.set_edgecolor(INK)
    return fig
