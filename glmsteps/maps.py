"""Voxel vectors <-> 3D maps, and writing/reading statistical maps.

Stored fits keep values only for fitted voxels (a vector of length ``v`` plus
their flat C-order indices in the grid). These helpers put such vectors back
on the grid, NaN elsewhere, and write them as float32 NIfTI.
"""

from __future__ import annotations

import os
from typing import Any

import numpy as np
import numpy.typing as npt

from . import __version__
from .errors import DataError
from .fileio import MapIntent, save_nifti

#: Rule for values outside the analysed voxels: NaN in every float map (statistical maps and
#: thresholded maps alike); 0 in integer masks, which cannot hold NaN.
OUTSIDE_VALUE = float("nan")


def statistic_intent(stat: str, dof: float | None = None, dof1: float | None = None) -> MapIntent:
    """The NIfTI-1 intent of a map by its statistic name.

    Parameters
    ----------
    stat : str
        ``t``, ``f``, ``z``, ``p``, ``effect``, ``variance``, ``p_fwe...`` or
        another name (no intent).
    dof : float, optional
        Degrees of freedom of a t map, denominator dof of an F map (one value
        for the map: the sidecar has the per-voxel detail).
    dof1 : float, optional
        Numerator degrees of freedom of an F map.

    Returns
    -------
    MapIntent

    Notes
    -----
    Intent codes of the NIfTI-1 standard (nifti1.h): t test (3, p1 = dof),
    F test (4, p1 = numerator, p2 = denominator dof), z score (5), p value (22),
    estimate (1001).
    """
    if stat == "t" and dof is not None:
        return MapIntent("t test", (float(dof),), "t")
    if stat == "f" and dof is not None and dof1 is not None:
        return MapIntent("f test", (float(dof1), float(dof)), "F")
    if stat in ("z", "z_thresholded"):
        return MapIntent("z score", (), "z")
    if stat == "p" or stat.startswith("p_fwe"):
        return MapIntent("p value", (), stat)
    if stat in ("effect", "variance", "mean", "residual_sd", "ar_coef"):
        return MapIntent("estimate", (), stat)
    return MapIntent()


def map_description(stat: str, contrast: str | None = None, level: str | None = None) -> str:
    """Short ``descrip`` text of a map, e.g. ``"glmsteps 0.1.0 z subject tap"`` (at most 79 characters)."""
    return " ".join(part for part in (f"glmsteps {__version__}", stat, level or "", contrast or "") if part)[:79]


def unmask(values: npt.ArrayLike, voxel_index: npt.NDArray[np.integer], shape: tuple[int, int, int],
           fill: float = np.nan) -> npt.NDArray[np.float32]:
    """Place per-voxel values on the 3D grid.

    Parameters
    ----------
    values : array_like, shape (v,)
        One value per fitted voxel.
    voxel_index : ndarray of int, shape (v,)
        Flat C-order indices of those voxels in ``shape``.
    shape : tuple of 3 int
        Grid shape (voxels).
    fill : float
        Value outside the voxel set (NaN by default).

    Returns
    -------
    ndarray, shape ``shape``, float32
    """
    vals = np.asarray(values)
    out = np.full(int(np.prod(shape)), fill, dtype=np.float32)
    out[np.asarray(voxel_index, dtype=np.int64)] = vals.astype(np.float32, copy=False)
    return out.reshape(shape)


def save_map(path: str | os.PathLike[str], values: npt.ArrayLike, voxel_index: npt.NDArray[np.integer],
             shape: tuple[int, int, int], affine: npt.NDArray[np.floating], intent: MapIntent | None = None,
             description: str = "") -> None:
    """Write per-voxel values as a float32 NIfTI map, NaN outside the voxel set (atomic).

    ``intent`` and ``description`` go into the header (:func:`statistic_intent`,
    :func:`map_description`).
    """
    save_nifti(path, unmask(values, voxel_index, shape), affine, intent=intent, description=description)


def load_map(path: str | os.PathLike[str]) -> tuple[npt.NDArray[np.float32], npt.NDArray[np.float64]]:
    """Read a 3D map as float32 with its affine; a 4D or 2D file is a DataError."""
    import nibabel as nib

    try:
        img = nib.load(os.fspath(path))
    except Exception as exc:  # nibabel raises many types for unreadable files
        raise DataError(f"{path}: cannot read as NIfTI ({exc}); check the file is a valid .nii/.nii.gz") from exc
    data = np.asarray(img.dataobj, dtype=np.float32)
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise DataError(f"{path}: expected a 3D map, found shape {data.shape}; pass a single-volume image")
    return data, np.asarray(img.affine, dtype=np.float64)


def map_block(level: str, subject: str | None, session: str | None, task: str | None, run: str | None,
              contrast: str | None, stat: str) -> dict[str, Any]:
    """The ``map`` block of a map sidecar, which the index step turns into an ``index.tsv`` row.

    The one builder of it for every step (fit, contrast, combine_runs, the group steps).

    Parameters
    ----------
    level : str
        ``run``, ``subject`` or ``group``.
    subject, session, task, run, contrast : str or None
        The map's BIDS entities and contrast (None or ``""`` where they do not apply).
    stat : str
        What the map holds (``effect``, ``t``, ``z``, ``p``, ``mean``, ...).
    """
    return {"level": level, "subject": subject, "session": session, "task": task, "run": run,
            "contrast": contrast, "stat": stat}
