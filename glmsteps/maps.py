"""Voxel vectors <-> 3D maps, and writing/reading statistical maps.

Stored fits keep values only for fitted voxels (a vector of length ``v`` plus
their flat C-order indices in the grid). These helpers put such vectors back
on the grid, NaN elsewhere, and write them as float32 NIfTI.
"""

from __future__ import annotations

import os

import numpy as np
import numpy.typing as npt

from .errors import DataError
from .fileio import save_nifti


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
             shape: tuple[int, int, int], affine: npt.NDArray[np.floating]) -> None:
    """Write per-voxel values as a float32 NIfTI map, NaN outside the voxel set (atomic)."""
    save_nifti(path, unmask(values, voxel_index, shape), affine)


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
