"""Orthogonal slices of a thresholded map over an underlay, in the house style."""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt
from matplotlib import colors

from .style import INK, MAGNITUDE_CMAP, SIGNED_CMAP, new_figure


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
        Voxel-to-world transform (mm); its voxel sizes set the panel aspect.
    centre_ijk : tuple of 3 int
        Voxel the slices pass through (the peak).
    title : str
    colour_label : str
        Colour bar label.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Panels show the planes j-k (x fixed), i-k (y fixed) and i-j (z fixed) in
    voxel order; signed maps use the diverging palette centred on 0,
    positive-only maps the magnitude ramp from 0.
    """
    under = np.nan_to_num(np.asarray(underlay3d, dtype=np.float64), nan=0.0)
    stat = np.asarray(stat3d, dtype=np.float64)
    over = np.where(np.isfinite(stat) & (stat != 0), stat, np.nan)
    zooms = np.sqrt((np.asarray(affine, dtype=np.float64)[:3, :3] ** 2).sum(axis=0))
    i, j, k = (int(c) for c in centre_ijk)
    finite = over[np.isfinite(over)]
    if finite.size and finite.min() < 0:
        vmax = float(np.abs(finite).max())
        cmap, norm = SIGNED_CMAP, colors.TwoSlopeNorm(vcenter=0.0, vmin=-vmax, vmax=vmax)
    else:
        cmap, norm = MAGNITUDE_CMAP, colors.Normalize(vmin=0.0, vmax=float(finite.max()) if finite.size else 1.0)
    lo, hi = np.percentile(under[under > 0], [2, 98]) if (under > 0).any() else (0.0, 1.0)
    world = np.asarray(affine, dtype=np.float64) @ np.array([i, j, k, 1.0])
    planes = [
        (f"i = {i}  (x {world[0]:.0f} mm)", under[i, :, :], over[i, :, :], zooms[2] / zooms[1]),
        (f"j = {j}  (y {world[1]:.0f} mm)", under[:, j, :], over[:, j, :], zooms[2] / zooms[0]),
        (f"k = {k}  (z {world[2]:.0f} mm)", under[:, :, k], over[:, :, k], zooms[1] / zooms[0]),
    ]
    fig, axes = new_figure(9.0, 3.4, ncols=3)
    image = None
    for ax, (label, u, o, aspect) in zip(axes, planes):
        ax.imshow(np.rot90(u), cmap="gray", vmin=lo, vmax=hi if hi > lo else lo + 1, aspect=aspect,
                  interpolation="nearest")
        image = ax.imshow(np.rot90(o), cmap=cmap, norm=norm, aspect=aspect, interpolation="nearest")
        ax.set_title(label, color=INK)
        ax.set_xticks([])
        ax.set_yticks([])
        for spine in ax.spines.values():
            spine.set_visible(False)
    fig.suptitle(title, color=INK, fontsize=9, fontweight="bold", y=1.06)
    bar = fig.colorbar(image, ax=list(axes), fraction=0.025, pad=0.02)
    bar.set_label(colour_label, color=INK)
    bar.outline.set_edgecolor(INK)
    return fig
