"""Clusters of statistical maps: connectivity, labelling, world-mm peaks, one cluster table.

Pure maths on arrays (no file access), shared by thresholding
(:mod:`glmsteps.threshold`, ``jobs/threshold.py``) and permutation inference
(:mod:`glmsteps.permutation`, ``jobs/group_permutation.py``).

Connectivity
------------
Two voxels are neighbours when they share a face (6), a face or an edge (18),
or any corner (26); ``scipy.ndimage.generate_binary_structure(3, r)`` with
r = 1, 2, 3.

World coordinates
-----------------
``(x, y, z) = A[:3, :3] (i, j, k) + A[:3, 3]`` for the map's voxel-to-world
affine ``A`` (NIfTI sform/qform convention, mm).

Cluster table (one row per cluster, largest first)
--------------------------------------------------
``cluster_id`` (1 = largest), ``size_voxels``, ``volume_mm3``, ``peak_stat``
(signed value at the voxel of largest |stat|), ``peak_i``, ``peak_j``,
``peak_k`` (voxel indices), ``peak_x_mm``, ``peak_y_mm``, ``peak_z_mm``,
``centre_x_mm``, ``centre_y_mm``, ``centre_z_mm`` (unweighted mean of the
cluster's voxel positions), then for k = 1..subpeaks: ``subpeak<k>_stat``,
``subpeak<k>_x_mm``, ``subpeak<k>_y_mm``, ``subpeak<k>_z_mm`` (n/a where a
cluster has fewer sub-peaks). Sub-peaks are local maxima of |stat| within the
cluster (26-neighbourhood), taken in decreasing |stat| and kept when more than
``subpeak_spacing_mm`` from the peak and from every sub-peak already kept.
Permutation inference appends ``mass`` (sum of the statistic's magnitude over
the cluster), ``p_fwe_extent`` and ``p_fwe_mass``. Written tables are rounded
by :func:`round_cluster_table`: millimetres to 0.1 mm, statistics and p-values
to 3 significant digits.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import ndimage

Connectivity = Literal[6, 18, 26]
#: Accepted connectivities and the rank of their structuring element.
CONNECTIVITY_RANK: dict[int, int] = {6: 1, 18: 2, 26: 3}
#: Default number of sub-peaks per cluster in cluster tables (config/schema.yaml's default).
DEFAULT_SUBPEAKS = 4
#: Default least distance (mm) between reported peaks of one cluster (config/schema.yaml's default).
#: Twice a usual 6 mm smoothing kernel, so a sub-peak is not a ripple of the peak's own blob.
DEFAULT_SUBPEAK_SPACING_MM = 12.0
#: Columns appended to the cluster table by permutation inference.
PERMUTATION_COLUMNS: tuple[str, ...] = ("mass", "p_fwe_extent", "p_fwe_mass")

IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]


def connectivity_structure(ndim: int = 3, connectivity: Connectivity = 26) -> npt.NDArray[np.bool_]:
    """Neighbourhood for labelling: 6, 18 or 26 neighbours in 3D; all neighbours in other dimensions."""
    if ndim != 3:
        return ndimage.generate_binary_structure(ndim, ndim)
    if isinstance(connectivity, bool) or connectivity not in CONNECTIVITY_RANK:
        raise ValueError(f"connectivity must be 6, 18 or 26, got {connectivity!r}")
    return ndimage.generate_binary_structure(3, CONNECTIVITY_RANK[int(connectivity)])


def voxel_to_world(affine: npt.ArrayLike, ijk: npt.ArrayLike) -> FloatArray:
    """World coordinates (mm) of voxel indices.

    Parameters
    ----------
    affine : array_like, shape (4, 4)
        Voxel-to-world transform.
    ijk : array_like, shape (..., 3)
        Voxel indices (may be fractional).

    Returns
    -------
    ndarray, shape (..., 3)
        ``A[:3, :3] @ ijk + A[:3, 3]``.
    """
    A = np.asarray(affine, dtype=np.float64)
    return np.asarray(ijk, dtype=np.float64) @ A[:3, :3].T + A[:3, 3]


def voxel_volume_mm3(affine: npt.ArrayLike) -> float:
    """Volume of one voxel: |det A[:3, :3]| (mm^3)."""
    return float(abs(np.linalg.det(np.asarray(affine, dtype=np.float64)[:3, :3])))


# ---------------------------------------------------------------------------
# labelling
# ---------------------------------------------------------------------------

def label_mask(mask3d: npt.NDArray[np.bool_], connectivity: Connectivity = 26) -> tuple[npt.NDArray[np.int32], int]:
    """Label the connected clusters of a 3D mask, largest cluster first.

    Parameters
    ----------
    mask3d : ndarray of bool, shape (nx, ny, nz)
    connectivity : {6, 18, 26}

    Returns
    -------
    labels : ndarray of int32, shape (nx, ny, nz)
        0 outside the mask; 1 for the largest cluster, 2 the next, ...
        (ties ordered by the first voxel in C order).
    n_clusters : int
    """
    raw, n = ndimage.label(np.asarray(mask3d, dtype=bool), structure=connectivity_structure(3, connectivity))
    if n == 0:
        return raw.astype(np.int32), 0
    sizes = np.bincount(raw.ravel(), minlength=n + 1)[1:]
    order = np.lexsort((np.arange(n), -sizes))       # by size desc, then first found
    new_label = np.zeros(n + 1, dtype=np.int32)
    new_label[order + 1] = np.arange(1, n + 1, dtype=np.int32)
    return new_label[raw], int(n)


def relabel_by_size(labels: npt.NDArray[np.integer], keep: npt.NDArray[np.bool_]
                    ) -> tuple[npt.NDArray[np.int32], int]:
    """Renumber the kept labels 1..n by decreasing size (ties: lower old label first); 0 elsewhere."""
    kept = np.unique(labels[keep])
    kept = kept[kept > 0]
    if kept.size == 0:
        return np.zeros(labels.shape, dtype=np.int32), 0
    sizes = np.bincount(labels.ravel())[kept]
    order = np.lexsort((kept, -sizes))
    mapping = np.zeros(int(labels.max()) + 1, dtype=np.int32)
    mapping[kept[order]] = np.arange(1, kept.size + 1, dtype=np.int32)
    return np.where(keep, mapping[labels], 0).astype(np.int32), int(kept.size)


def label_signed(positive: npt.NDArray[np.bool_], negative: npt.NDArray[np.bool_],
                 connectivity: Connectivity = 26) -> tuple[npt.NDArray[np.int32], int]:
    """Label positive and negative voxels apart (they never share a cluster), largest first.

    Parameters
    ----------
    positive, negative : ndarray of bool, same shape (disjoint)

    Returns
    -------
    labels : ndarray of int32
    n_clusters : int
    """
    lab_pos, n_pos = label_mask(positive, connectivity)
    lab_neg, _ = label_mask(negative, connectivity)
    combined = np.where(lab_neg > 0, lab_neg + n_pos, lab_pos)
    return relabel_by_size(combined, combined > 0)


@dataclass(frozen=True)
class SpatialGrid:
    """Voxels of an analysis inside the bounding box of its mask (for fast repeated labelling).

    Attributes
    ----------
    shape : tuple of int
        Bounding-box shape.
    index : ndarray of int, shape (n_voxels,)
        Flat C-order index of each analysed voxel within the box.
    structure : ndarray of bool
        Labelling neighbourhood.
    """

    shape: tuple[int, ...]
    index: IntArray
    structure: npt.NDArray[np.bool_]


def make_spatial_grid(voxel_index: npt.ArrayLike, shape: tuple[int, ...],
                      connectivity: Connectivity = 26) -> SpatialGrid:
    """Crop the grid to the bounding box of the analysed voxels."""
    coords = np.array(np.unravel_index(np.asarray(voxel_index, dtype=np.int64), shape))
    low = coords.min(axis=1)
    box = tuple(int(v) for v in coords.max(axis=1) - low + 1)
    index = np.ravel_multi_index(tuple(coords - low[:, None]), box).astype(np.int64)
    return SpatialGrid(shape=box, index=index, structure=connectivity_structure(len(shape), connectivity))


def label_voxels(values: FloatArray, threshold: float, grid: SpatialGrid) -> tuple[IntArray, int]:
    """Label analysed voxels with value > threshold into connected clusters (found order).

    Returns
    -------
    labels : ndarray of int, shape (n_voxels,)
        Cluster number (1..n_clusters) of each voxel, 0 at or below threshold.
    n_clusters : int
    """
    volume = np.zeros(int(np.prod(grid.shape)), dtype=bool)
    volume[grid.index] = np.nan_to_num(values, nan=-np.inf) > threshold
    labelled, n_clusters = ndimage.label(volume.reshape(grid.shape), structure=grid.structure)
    return labelled.reshape(-1)[grid.index].astype(np.int64), int(n_clusters)


def cluster_extent_mass(values: FloatArray, threshold: float, grid: SpatialGrid
                        ) -> tuple[IntArray, FloatArray, FloatArray]:
    """Clusters of voxels above ``threshold`` with their extent and mass.

    Parameters
    ----------
    values : ndarray, shape (n_voxels,)
        Statistic per analysed voxel (already oriented: large = evidence).
    threshold : float
        Cluster-forming threshold (voxels strictly above it).
    grid : SpatialGrid

    Returns
    -------
    labels : ndarray of int, shape (n_voxels,)
    extent : ndarray, shape (n_clusters,)
        Voxel count of cluster k (index k - 1).
    mass : ndarray, shape (n_clusters,)
        Sum of the statistic over the cluster's voxels.

    Notes
    -----
    Cluster mass as the sum of suprathreshold statistic values (Bullmore et al.
    1999, IEEE Trans Med Imaging 18:32).
    """
    labels, n_clusters = label_voxels(values, threshold, grid)
    extent = np.bincount(labels, minlength=n_clusters + 1)[1:].astype(np.float64)
    mass = np.bincount(labels, weights=np.where(labels > 0, values, 0.0), minlength=n_clusters + 1)[1:]
    return labels, extent, mass


# ---------------------------------------------------------------------------
# the table
# ---------------------------------------------------------------------------

def cluster_columns(subpeaks: int = DEFAULT_SUBPEAKS, extra: Sequence[str] = ()) -> list[str]:
    """Column names of the cluster table (see the module docstring)."""
    cols = ["cluster_id", "size_voxels", "volume_mm3", "peak_stat", "peak_i", "peak_j", "peak_k",
            "peak_x_mm", "peak_y_mm", "peak_z_mm", "centre_x_mm", "centre_y_mm", "centre_z_mm"]
    for k in range(1, subpeaks + 1):
        cols += [f"subpeak{k}_stat", f"subpeak{k}_x_mm", f"subpeak{k}_y_mm", f"subpeak{k}_z_mm"]
    return cols + list(extra)


_INT_COLUMNS = ("cluster_id", "size_voxels", "peak_i", "peak_j", "peak_k")


def _empty_table(subpeaks: int, extra: Sequence[str]) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype="int64" if c in _INT_COLUMNS else "float64")
                         for c in cluster_columns(subpeaks, extra)})


def _subpeaks(stat: FloatArray, inside: npt.NDArray[np.bool_], peak: tuple[int, ...], affine: np.ndarray,
              subpeaks: int, spacing_mm: float) -> list[tuple[float, FloatArray]]:
    """Sub-peaks of one cluster (``inside``, a cropped box) as (signed stat, xyz mm), box offsets applied."""
    mag = np.where(inside, np.abs(np.nan_to_num(stat, nan=0.0)), -np.inf)
    local_max = (ndimage.maximum_filter(mag, size=3, mode="constant", cval=-np.inf) == mag) & inside
    cand = np.argwhere(local_max)
    cand = cand[np.argsort(-mag[tuple(cand.T)], kind="stable")]
    kept = [voxel_to_world(affine, peak)]
    found: list[tuple[float, FloatArray]] = []
    for vox in cand:
        if len(found) >= subpeaks:
            break
        if tuple(vox) == tuple(peak):
            continue
        xyz = voxel_to_world(affine, vox)
        if all(np.linalg.norm(xyz - other) > spacing_mm for other in kept):
            kept.append(xyz)
            found.append((float(stat[tuple(vox)]), xyz))
    return found


def cluster_table(stat3d: npt.NDArray[np.floating], labels: npt.NDArray[np.integer], affine: npt.ArrayLike,
                  subpeaks: int = DEFAULT_SUBPEAKS, subpeak_spacing_mm: float = DEFAULT_SUBPEAK_SPACING_MM
                  ) -> pd.DataFrame:
    """Table of clusters with peak, centre and sub-peaks in world mm (full precision).

    Parameters
    ----------
    stat3d : ndarray, shape (nx, ny, nz)
        Statistic map (z or t); peaks are taken on |stat| and reported signed.
    labels : ndarray of int, shape (nx, ny, nz)
        Cluster labels 1..n (0 = background), e.g. from :func:`label_mask`.
    affine : array_like, shape (4, 4)
        Voxel-to-world transform (mm).
    subpeaks : int
        Number of sub-peak column groups (>= 0).
    subpeak_spacing_mm : float
        Least distance between reported peaks of one cluster (mm).

    Returns
    -------
    pandas.DataFrame
        Columns :func:`cluster_columns`; one row per label in increasing label
        order; header only when ``labels`` is all 0.

    Notes
    -----
    World coordinates through :func:`voxel_to_world`. Local maxima: a 3x3x3
    maximum filter of |stat| restricted to the cluster, on the cluster's
    bounding box (``scipy.ndimage.find_objects``) padded by one voxel.
    """
    stat = np.asarray(stat3d, dtype=np.float64)
    labels = np.asarray(labels)
    A = np.asarray(affine, dtype=np.float64)
    n = int(labels.max()) if labels.size else 0
    if n == 0:
        return _empty_table(subpeaks, ())
    volume = voxel_volume_mm3(A)
    rows = []
    boxes = ndimage.find_objects(labels.astype(np.int64), max_label=n)
    for lab, box in enumerate(boxes, start=1):
        if box is None:
            continue
        padded = tuple(slice(max(s.start - 1, 0), min(s.stop + 1, dim)) for s, dim in zip(box, labels.shape))
        offset = np.array([s.start for s in padded])
        inside = labels[padded] == lab
        sub_stat = stat[padded]
        idx = np.argwhere(inside)
        mag = np.where(inside, np.abs(np.nan_to_num(sub_stat, nan=0.0)), -np.inf)
        peak_local = tuple(int(v) for v in np.unravel_index(np.argmax(mag), mag.shape))
        peak = tuple(int(v) for v in np.add(peak_local, offset))
        # sub-peaks in the cropped box, coordinates shifted back to the full grid
        shifted = A.copy()
        shifted[:3, 3] = voxel_to_world(A, offset)
        subs = _subpeaks(sub_stat, inside, peak_local, shifted, subpeaks, subpeak_spacing_mm)
        peak_xyz = voxel_to_world(A, peak)
        centre = voxel_to_world(A, idx + offset).mean(axis=0)
        row: dict[str, Any] = {"cluster_id": lab, "size_voxels": int(len(idx)), "volume_mm3": len(idx) * volume,
                               "peak_stat": float(stat[peak]), "peak_i": peak[0], "peak_j": peak[1],
                               "peak_k": peak[2]}
        row.update(dict(zip(("peak_x_mm", "peak_y_mm", "peak_z_mm"), map(float, peak_xyz))))
        row.update(dict(zip(("centre_x_mm", "centre_y_mm", "centre_z_mm"), map(float, centre))))
        for k in range(1, subpeaks + 1):
            value, xyz = subs[k - 1] if k <= len(subs) else (math.nan, (math.nan,) * 3)
            row[f"subpeak{k}_stat"] = value
            row.update({f"subpeak{k}_{a}_mm": float(c) for a, c in zip("xyz", xyz)})
        rows.append(row)
    return pd.DataFrame(rows, columns=cluster_columns(subpeaks))


def _significant(values: pd.Series, digits: int = 3) -> pd.Series:
    """Round to ``digits`` significant digits (NaN kept)."""
    x = values.to_numpy(dtype=np.float64)
    out = np.full(x.shape, np.nan)
    ok = np.isfinite(x) & (x != 0)
    exponent = np.floor(np.log10(np.abs(x[ok])))
    factor = 10.0 ** (digits - 1 - exponent)
    out[ok] = np.round(x[ok] * factor) / factor
    out[np.isfinite(x) & (x == 0)] = 0.0
    return pd.Series(out, index=values.index)


def round_cluster_table(table: pd.DataFrame) -> pd.DataFrame:
    """A cluster table rounded for writing: 0.1 mm (and mm^3), 3 significant digits for statistics and p.

    Columns ending in ``_mm`` or ``_mm3`` are rounded to one decimal; the
    statistic columns (``peak_stat``, ``subpeak<k>_stat``, ``mass``) and
    p-values (``p_*``) to 3 significant digits; integer columns are kept.
    """
    out = table.copy()
    for column in out.columns:
        if column in _INT_COLUMNS:
            continue
        if column.endswith("_mm") or column.endswith("_mm3"):
            out[column] = out[column].astype(np.float64).round(1)
        elif column.endswith("_stat") or column == "mass" or column.startswith("p_"):
            out[column] = _significant(out[column])
    return out
