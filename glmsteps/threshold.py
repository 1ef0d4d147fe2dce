"""Thresholding of statistical maps: FDR, Bonferroni, cluster extent, cluster tables.

Pure maths on 3D arrays; no file access.

Threshold settings (one mapping per named threshold)::

    {method: uncorrected,    p: 0.001,  min_cluster_voxels: k (optional, default 1)}
    {method: fdr,            q: 0.05}
    {method: bonferroni,     alpha: 0.05}
    {method: cluster_extent, forming_p: 0.001, min_cluster_voxels: k}

Every setting also takes ``connectivity`` (6, 18 or 26; default 26) and
``tail`` (``two-sided`` default, ``positive``, ``negative``). The test itself
uses the ``p`` map as written by the contrast step (its own tail); ``tail``
here chooses which signs of z may be kept: ``positive`` keeps z > 0 only,
``negative`` z < 0 only, ``two-sided`` both. Positive and negative voxels
never join one cluster. The number of tests for FDR and Bonferroni is the
number of voxels with a finite p.

Cluster table (one row per cluster, largest first)
--------------------------------------------------
``cluster_id`` (1 = largest), ``size_voxels``, ``volume_mm3``,
``peak_stat`` (signed value at the voxel of largest |stat|), ``peak_x_mm``,
``peak_y_mm``, ``peak_z_mm`` (world mm through the affine), ``centre_x_mm``,
``centre_y_mm``, ``centre_z_mm`` (unweighted mean of the cluster's voxel
positions), then for k = 1..max_subpeaks: ``subpeak<k>_stat``,
``subpeak<k>_x_mm``, ``subpeak<k>_y_mm``, ``subpeak<k>_z_mm`` (NaN where a
cluster has fewer sub-peaks). Sub-peaks are local maxima of |stat| in the
cluster (26-neighbourhood), taken in decreasing |stat| and kept when more than
``min_distance_mm`` from the peak and every sub-peak already kept.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd
from nibabel.affines import apply_affine
from scipy import ndimage

from . import stats
from .errors import ConfigError

Method = Literal["uncorrected", "fdr", "bonferroni", "cluster_extent"]
Connectivity = Literal[6, 18, 26]
_CONNECTIVITY_RANK = {6: 1, 18: 2, 26: 3}
_KEYS: dict[str, dict[str, bool]] = {  # method -> {key: required}
    "uncorrected": {"p": True, "min_cluster_voxels": False},
    "fdr": {"q": True},
    "bonferroni": {"alpha": True},
    "cluster_extent": {"forming_p": True, "min_cluster_voxels": True},
}
_COMMON = {"method", "name", "connectivity", "tail"}


@dataclass(frozen=True)
class ThresholdSetting:
    """A validated threshold setting.

    Attributes
    ----------
    name : str
    method : {"uncorrected", "fdr", "bonferroni", "cluster_extent"}
    level : float
        p (uncorrected), q (fdr), alpha (bonferroni) or forming_p (cluster_extent).
    min_cluster_voxels : int
        Clusters smaller than this are removed (1 keeps all).
    connectivity : {6, 18, 26}
    tail : {"two-sided", "positive", "negative"}
    """

    name: str
    method: Method
    level: float
    min_cluster_voxels: int = 1
    connectivity: Connectivity = 26
    tail: stats.Tail = "two-sided"


def parse_setting(setting: Mapping[str, Any], name: str | None = None) -> ThresholdSetting:
    """Validate a threshold setting mapping; raise ConfigError with a one-line message.

    Parameters
    ----------
    setting : mapping
        See the module docstring.
    name : str, optional
        Threshold name (default ``setting["name"]``).
    """
    if name is None:
        name = str(setting.get("name", "threshold")) if isinstance(setting, Mapping) else "threshold"
    label = name
    where = f"threshold {label!r}"
    if not isinstance(setting, Mapping):
        raise ConfigError(f"{where}: setting must be a mapping with 'method', found {type(setting).__name__}")
    method = setting.get("method")
    if method not in _KEYS:
        raise ConfigError(f"{where}: method must be one of {list(_KEYS)}, found {method!r}")
    allowed = _KEYS[method]
    unknown = set(setting) - _COMMON - set(allowed)
    if unknown:
        raise ConfigError(f"{where}: unknown key(s) {sorted(unknown)} for method {method!r}; "
                          f"allowed: {sorted(set(allowed) | _COMMON)}")
    missing = [k for k, req in allowed.items() if req and k not in setting]
    if missing:
        raise ConfigError(f"{where}: method {method!r} needs {missing}; add them to the setting")
    level_key = next(k for k in allowed if k != "min_cluster_voxels")
    level = setting[level_key]
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not (0.0 < float(level) < 1.0):
        raise ConfigError(f"{where}: {level_key} must be a number in (0, 1), found {level!r}")
    k = setting.get("min_cluster_voxels", 1)
    if isinstance(k, bool) or not isinstance(k, int) or k < 1:
        raise ConfigError(f"{where}: min_cluster_voxels must be an integer >= 1, found {k!r}")
    conn = setting.get("connectivity", 26)
    if conn not in _CONNECTIVITY_RANK or isinstance(conn, bool):
        raise ConfigError(f"{where}: connectivity must be 6, 18 or 26, found {conn!r}")
    tail = setting.get("tail", "two-sided")
    if tail not in stats.TAILS:
        raise ConfigError(f"{where}: tail must be one of {list(stats.TAILS)}, found {tail!r}")
    return ThresholdSetting(str(label), method, float(level), int(k), int(conn), tail)


def fdr_threshold(p: npt.ArrayLike, q: float) -> float:
    """Benjamini-Hochberg p-value cutoff controlling the false discovery rate at q.

    Parameters
    ----------
    p : array_like of float, shape (m,)
        p-values; NaN entries are ignored (not counted as tests).
    q : float
        Target false discovery rate, in (0, 1).

    Returns
    -------
    float
        The largest :math:`p_{(k)}` with :math:`p_{(k)} \\le k q / m`; reject
        every hypothesis with ``p <= cutoff``. NaN when nothing is rejected
        (``p <= nan`` is False everywhere).

    Notes
    -----
    Benjamini & Hochberg (1995), J. R. Stat. Soc. B 57:289-300, step-up
    procedure with :math:`m` the number of tests.
    """
    vals = np.asarray(p, dtype=np.float64).ravel()
    vals = np.sort(vals[np.isfinite(vals)])
    m = vals.size
    if m == 0:
        return float("nan")
    passed = np.flatnonzero(vals <= q * np.arange(1, m + 1) / m)
    return float(vals[passed[-1]]) if passed.size else float("nan")


def bonferroni_threshold(n_tests: int, alpha: float) -> float:
    """Bonferroni p-value cutoff ``alpha / n_tests`` (Dunn 1961); reject ``p <= cutoff``."""
    return alpha / n_tests if n_tests > 0 else float("nan")


def label_clusters(mask3d: npt.NDArray[np.bool_], connectivity: Connectivity = 26) -> tuple[npt.NDArray[np.int32], int]:
    """Label the connected clusters of a 3D mask, largest cluster first.

    Parameters
    ----------
    mask3d : ndarray of bool, shape (nx, ny, nz)
    connectivity : {6, 18, 26}
        Neighbours sharing a face (6), a face or edge (18), or any corner (26).

    Returns
    -------
    labels : ndarray of int32, shape (nx, ny, nz)
        0 outside the mask; 1 for the largest cluster, 2 the next, ...
        (ties ordered by the first voxel in C order).
    n_clusters : int

    Notes
    -----
    Connected components (``scipy.ndimage.label``) with the structuring
    element ``generate_binary_structure(3, r)``, r = 1, 2, 3.
    """
    if connectivity not in _CONNECTIVITY_RANK:
        raise ValueError(f"connectivity must be 6, 18 or 26, got {connectivity!r}")
    structure = ndimage.generate_binary_structure(3, _CONNECTIVITY_RANK[connectivity])
    raw, n = ndimage.label(np.asarray(mask3d, dtype=bool), structure=structure)
    if n == 0:
        return raw.astype(np.int32), 0
    sizes = np.bincount(raw.ravel(), minlength=n + 1)[1:]
    order = np.lexsort((np.arange(n), -sizes))       # by size desc, then first-found
    new_label = np.zeros(n + 1, dtype=np.int32)
    new_label[order + 1] = np.arange(1, n + 1, dtype=np.int32)
    return new_label[raw], int(n)


def _empty_table(max_subpeaks: int) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype="int64" if c in ("cluster_id", "size_voxels") else "float64")
                         for c in cluster_columns(max_subpeaks)})


def cluster_columns(max_subpeaks: int = 3) -> list[str]:
    """Column names of the cluster table (see the module docstring)."""
    cols = ["cluster_id", "size_voxels", "volume_mm3", "peak_stat", "peak_x_mm", "peak_y_mm", "peak_z_mm",
            "centre_x_mm", "centre_y_mm", "centre_z_mm"]
    for k in range(1, max_subpeaks + 1):
        cols += [f"subpeak{k}_stat", f"subpeak{k}_x_mm", f"subpeak{k}_y_mm", f"subpeak{k}_z_mm"]
    return cols


def cluster_table(stat3d: npt.NDArray[np.floating], labels: npt.NDArray[np.integer],
                  affine: npt.NDArray[np.floating], voxel_volume_mm3: float, min_distance_mm: float = 8.0,
                  max_subpeaks: int = 3) -> pd.DataFrame:
    """Table of clusters with peak, centre and sub-peaks in world mm.

    Parameters
    ----------
    stat3d : ndarray, shape (nx, ny, nz)
        Statistic map (z); peaks are taken on |stat|, reported signed.
    labels : ndarray of int, shape (nx, ny, nz)
        Cluster labels 1..n (0 = background), as from :func:`label_clusters`.
    affine : ndarray, shape (4, 4)
        Voxel-to-world transform (mm).
    voxel_volume_mm3 : float
        Volume of one voxel (mm^3).
    min_distance_mm : float
        Minimum distance between reported peaks (mm).
    max_subpeaks : int
        Number of sub-peak column groups.

    Returns
    -------
    pandas.DataFrame
        Columns :func:`cluster_columns`; one row per label in increasing
        label order; no rows when ``labels`` is all 0.

    Notes
    -----
    World coordinates :math:`(x, y, z, 1)' = A\\,(i, j, k, 1)'`. Local maxima
    use a 3x3x3 maximum filter of |stat| restricted to the cluster.
    """
    stat = np.asarray(stat3d, dtype=np.float64)
    labels = np.asarray(labels)
    n = int(labels.max()) if labels.size else 0
    if n == 0:
        return _empty_table(max_subpeaks)
    mag = np.where(labels > 0, np.abs(np.nan_to_num(stat, nan=0.0)), -np.inf)
    rows = []
    for lab in range(1, n + 1):
        inside = labels == lab
        idx = np.argwhere(inside)
        if idx.size == 0:
            continue
        cl_mag = np.where(inside, mag, -np.inf)
        local_max = (ndimage.maximum_filter(cl_mag, size=3, mode="constant", cval=-np.inf) == cl_mag) & inside
        cand = np.argwhere(local_max)
        cand = cand[np.argsort(-cl_mag[tuple(cand.T)], kind="stable")]
        peak = tuple(np.unravel_index(np.argmax(cl_mag), cl_mag.shape))
        kept_mm = [apply_affine(affine, peak)]
        sub = []
        for vox in cand:
            if len(sub) >= max_subpeaks:
                break
            if tuple(vox) == peak:
                continue
            xyz = apply_affine(affine, vox)
            if all(np.linalg.norm(xyz - other) > min_distance_mm for other in kept_mm):
                kept_mm.append(xyz)
                sub.append((float(stat[tuple(vox)]), xyz))
        centre = apply_affine(affine, idx.astype(np.float64)).mean(axis=0)
        row: dict[str, Any] = {"cluster_id": lab, "size_voxels": int(len(idx)),
                               "volume_mm3": round(float(len(idx) * voxel_volume_mm3), 6), "peak_stat": float(stat[peak])}
        row.update(dict(zip(("peak_x_mm", "peak_y_mm", "peak_z_mm"), map(float, kept_mm[0]))))
        row.update(dict(zip(("centre_x_mm", "centre_y_mm", "centre_z_mm"), map(float, centre))))
        for k in range(1, max_subpeaks + 1):
            value, xyz = sub[k - 1] if k <= len(sub) else (math.nan, (math.nan,) * 3)
            row[f"subpeak{k}_stat"] = value
            row.update({f"subpeak{k}_{a}_mm": float(c) for a, c in zip("xyz", xyz)})
        rows.append(row)
    return pd.DataFrame(rows, columns=cluster_columns(max_subpeaks))


@dataclass
class ThresholdResult:
    """Outcome of thresholding one map.

    Attributes
    ----------
    mask : ndarray of bool, shape (nx, ny, nz)
        Surviving voxels.
    labels : ndarray of int32, shape (nx, ny, nz)
        Clusters of the surviving voxels (largest first).
    n_clusters : int
    n_tests : int
        Voxels with a finite p.
    p_cutoff : float or None
        The p-value cutoff used (None when FDR rejects nothing).
    note : str
        Human-readable summary (e.g. why nothing survived).
    """

    mask: npt.NDArray[np.bool_]
    labels: npt.NDArray[np.int32]
    n_clusters: int
    n_tests: int
    p_cutoff: float | None
    note: str


def threshold_map(z3d: npt.NDArray[np.floating], p3d: npt.NDArray[np.floating],
                  setting: ThresholdSetting) -> ThresholdResult:
    """Apply a threshold setting to a z map and its p map.

    Parameters
    ----------
    z3d : ndarray, shape (nx, ny, nz)
        z map (NaN outside the analysed voxels).
    p3d : ndarray, shape (nx, ny, nz)
        p map of the same test.
    setting : ThresholdSetting

    Returns
    -------
    ThresholdResult

    Notes
    -----
    Voxel-wise: ``p <= cutoff`` with cutoff p (uncorrected), the
    Benjamini-Hochberg cutoff (fdr) or alpha / m (bonferroni). Cluster extent:
    voxels with ``p <= forming_p`` grouped with the chosen connectivity;
    clusters of fewer than ``min_cluster_voxels`` voxels are removed (an
    extent threshold chosen by the user; common practice).
    """
    z = np.asarray(z3d, dtype=np.float64)
    p = np.asarray(p3d, dtype=np.float64)
    valid = np.isfinite(p) & np.isfinite(z)
    n_tests = int(valid.sum())
    if setting.method == "fdr":
        cutoff = fdr_threshold(p[valid], setting.level)
    elif setting.method == "bonferroni":
        cutoff = bonferroni_threshold(n_tests, setting.level)
    else:
        cutoff = setting.level
    sig = valid & (p <= cutoff) if math.isfinite(cutoff) else np.zeros(z.shape, dtype=bool)
    pos = sig & (z > 0) if setting.tail in ("two-sided", "positive") else np.zeros_like(sig)
    neg = sig & (z < 0) if setting.tail in ("two-sided", "negative") else np.zeros_like(sig)
    lab_pos, n_pos = label_clusters(pos, setting.connectivity)
    lab_neg, n_neg = label_clusters(neg, setting.connectivity)
    combined = np.where(lab_neg > 0, lab_neg + n_pos, lab_pos)
    sizes = np.bincount(combined.ravel(), minlength=n_pos + n_neg + 1)
    small = sizes < setting.min_cluster_voxels
    small[0] = True
    mask = ~small[combined]
    labels, n = _relabel(combined, mask)
    if n == 0:
        note = (f"no voxel survived ({setting.method}, {n_tests} tests"
                + (f", cutoff p <= {cutoff:.3g}" if math.isfinite(cutoff) else ", no p-value passed")
                + (f", clusters of >= {setting.min_cluster_voxels} voxels" if setting.min_cluster_voxels > 1 else "")
                + ")")
    else:
        note = f"{int(mask.sum())} voxels in {n} clusters survived ({setting.method}, {n_tests} tests)"
    return ThresholdResult(mask=mask, labels=labels, n_clusters=n, n_tests=n_tests,
                           p_cutoff=float(cutoff) if math.isfinite(cutoff) else None, note=note)


def _relabel(combined: npt.NDArray[np.integer], keep: npt.NDArray[np.bool_]) -> tuple[npt.NDArray[np.int32], int]:
    """Renumber kept labels 1..n by decreasing size (keeps positive and negative clusters apart)."""
    kept = np.unique(combined[keep])
    if kept.size == 0:
        return np.zeros(combined.shape, dtype=np.int32), 0
    sizes = np.bincount(combined.ravel())[kept]
    order = np.lexsort((kept, -sizes))
    mapping = np.zeros(int(combined.max()) + 1, dtype=np.int32)
    mapping[kept[order]] = np.arange(1, kept.size + 1, dtype=np.int32)
    return np.where(keep, mapping[combined], 0).astype(np.int32), int(kept.size)
