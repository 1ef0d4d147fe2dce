"""Thresholding of statistical maps: FDR, Bonferroni, uncorrected, cluster extent.

Pure maths on 3D arrays; no file access. Clusters (labelling, the cluster
table) are :mod:`glmsteps.clusters`.

Threshold settings (one mapping per named threshold)::

    {method: uncorrected,    p: 0.001,  min_cluster_voxels: k (optional, default 1)}
    {method: fdr,            q: 0.05}
    {method: bonferroni,     alpha: 0.05}
    {method: cluster_extent, forming_p: 0.001, min_cluster_voxels: k}

Every setting also takes ``connectivity`` (6, 18 or 26; default 26),
``tail`` (``two-sided`` default, ``positive``, ``negative``), ``subpeaks``
and ``subpeak_spacing_mm`` (the cluster table, see :mod:`glmsteps.clusters`).

Tail rule
---------
The test uses p-values for the tail the setting asks for
(:func:`p_for_tail`): the map's own ``p`` when it was computed for that tail
(or is an F test, which has one tail), otherwise the p of that tail computed
from ``z``. This is exact for t-based maps because their z carries the same
one-sided tail probability as t (``glmsteps.stats.t_to_z``). ``positive``
keeps z > 0 only, ``negative`` z < 0 only, ``two-sided`` both; positive and
negative voxels never join one cluster. The number of tests for FDR and
Bonferroni is the number of voxels with a finite p.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from . import clusters, stats
from .errors import ConfigError

Method = Literal["uncorrected", "fdr", "bonferroni", "cluster_extent"]
Connectivity = clusters.Connectivity
MapKind = Literal["t", "F"]
_KEYS: dict[str, dict[str, bool]] = {  # method -> {key: required}
    "uncorrected": {"p": True, "min_cluster_voxels": False},
    "fdr": {"q": True},
    "bonferroni": {"alpha": True},
    "cluster_extent": {"forming_p": True, "min_cluster_voxels": True},
}
_COMMON = {"method", "name", "connectivity", "tail", "subpeaks", "subpeak_spacing_mm"}
#: Bounds of ``subpeaks`` (config/schema.yaml's bounds).
MAX_SUBPEAKS = 20


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
    subpeaks : int
        Sub-peaks per cluster in the cluster table.
    subpeak_spacing_mm : float
        Least distance between reported peaks of a cluster (mm).
    """

    name: str
    method: Method
    level: float
    min_cluster_voxels: int = 1
    connectivity: Connectivity = 26
    tail: stats.Tail = "two-sided"
    subpeaks: int = clusters.DEFAULT_SUBPEAKS
    subpeak_spacing_mm: float = clusters.DEFAULT_SUBPEAK_SPACING_MM


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
    if conn not in clusters.CONNECTIVITY_RANK or isinstance(conn, bool):
        raise ConfigError(f"{where}: connectivity must be 6, 18 or 26, found {conn!r}")
    tail = setting.get("tail", "two-sided")
    if tail not in stats.TAILS:
        raise ConfigError(f"{where}: tail must be one of {list(stats.TAILS)}, found {tail!r}")
    n_sub = setting.get("subpeaks", clusters.DEFAULT_SUBPEAKS)
    if isinstance(n_sub, bool) or not isinstance(n_sub, int) or not 0 <= n_sub <= MAX_SUBPEAKS:
        raise ConfigError(f"{where}: subpeaks must be an integer from 0 to {MAX_SUBPEAKS}, found {n_sub!r}")
    spacing = setting.get("subpeak_spacing_mm", clusters.DEFAULT_SUBPEAK_SPACING_MM)
    if isinstance(spacing, bool) or not isinstance(spacing, (int, float)) or not spacing > 0:
        raise ConfigError(f"{where}: subpeak_spacing_mm must be a positive number (mm), found {spacing!r}")
    return ThresholdSetting(str(label), method, float(level), int(k), int(conn), tail, int(n_sub), float(spacing))


def p_for_tail(z: npt.ArrayLike, p: npt.ArrayLike, map_kind: MapKind | None, map_tail: str | None,
               tail: stats.Tail) -> tuple[npt.NDArray[np.float64], str]:
    """p-values for the tail a threshold asks for.

    Parameters
    ----------
    z, p : array_like, same shape
        The map's z and p (NaN outside the analysed voxels).
    map_kind : {"t", "F"} or None
        Test behind the maps (from the p map's sidecar; None when unknown).
    map_tail : str or None
        Tail the p map was computed for (t maps; None when unknown).
    tail : {"two-sided", "positive", "negative"}
        Tail of the threshold.

    Returns
    -------
    p : ndarray of float64
    source : str
        How p was obtained (for the sidecar).

    Notes
    -----
    For a t-based map z = sign(t) Phi^-1(1 - S(|t|)) has the tail
    probabilities of t (probability integral transform), so the p of any tail
    follows from z: positive Phi(-z), negative Phi(z), two-sided
    2 Phi(-|z|) (:func:`glmsteps.stats.z_logpvalue`). F maps have one tail and
    keep their p; so does a map whose tail is unknown.
    """
    z = np.asarray(z, dtype=np.float64)
    p = np.asarray(p, dtype=np.float64)
    if map_kind == "F":
        return p, "p map (F test, one tail)"
    if map_tail == tail:
        return p, f"p map ({tail})"
    if map_kind is None and map_tail is None:
        return p, "p map (tail not recorded; used as given)"
    with np.errstate(invalid="ignore"):
        p_tail = np.exp(stats.z_logpvalue(z, tail))
    return np.where(np.isfinite(p), p_tail, np.nan), f"from z for the {tail} tail (the p map is {map_tail})"


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
        p map of the same test, for the setting's tail (see :func:`p_for_tail`).
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
    combined, n_all = clusters.label_signed(pos, neg, setting.connectivity)
    sizes = np.bincount(combined.ravel(), minlength=n_all + 1)
    small = sizes < setting.min_cluster_voxels
    small[0] = True
    mask = ~small[combined]
    labels, n = clusters.relabel_by_size(combined, mask)
    if n == 0:
        note = (f"no voxel survived ({setting.method}, {n_tests} tests"
                + (f", cutoff p <= {cutoff:.3g}" if math.isfinite(cutoff) else ", no p-value passed")
                + (f", clusters of >= {setting.min_cluster_voxels} voxels" if setting.min_cluster_voxels > 1 else "")
                + ")")
    else:
        note = f"{int(mask.sum())} voxels in {n} clusters survived ({setting.method}, {n_tests} tests)"
    return ThresholdResult(mask=mask, labels=labels, n_clusters=n, n_tests=n_tests,
                           p_cutoff=float(cutoff) if math.isfinite(cutoff) else None, note=note)
