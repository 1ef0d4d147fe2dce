"""Fixed-effects combination of a subject's runs (pure maths, arrays in).

A run whose contrast was skipped or excluded is left out by the caller; a NaN
(or non-positive variance) at a voxel of a run means that run is missing at
that voxel only.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from . import stats
from .errors import DataError


@dataclass
class FixedEffectsResult:
    """Per-voxel fixed-effects results (arrays of shape (v,), float64).

    ``n_runs`` counts the runs present at each voxel; where it is 0 every
    other array is NaN.
    """

    effect: npt.NDArray[np.float64]
    variance: npt.NDArray[np.float64]
    dof: npt.NDArray[np.float64]
    t: npt.NDArray[np.float64]
    z: npt.NDArray[np.float64]
    p: npt.NDArray[np.float64]
    n_runs: npt.NDArray[np.int64]


def check_same_grid(shapes: Sequence[tuple[int, ...]], affines: Sequence[npt.NDArray[np.floating]],
                    labels: Sequence[str], atol_mm: float = 1e-3) -> None:
    """Raise DataError unless all maps share one voxel grid.

    Parameters
    ----------
    shapes : sequence of tuple
        Map shapes (voxels).
    affines : sequence of ndarray, shape (4, 4)
        Voxel-to-world transforms (mm).
    labels : sequence of str
        Names of the maps (files or runs) for the message.
    atol_mm : float
        Tolerance on affine entries (mm).
    """
    for shape, affine, label in zip(shapes[1:], affines[1:], labels[1:]):
        if tuple(shape) != tuple(shapes[0]) or not np.allclose(affine, affines[0], atol=atol_mm):
            raise DataError(f"{label}: voxel grid (shape {tuple(shape)}) differs from {labels[0]} "
                            f"(shape {tuple(shapes[0])}) or its affine does; resample the runs to one grid")


def fixed_effects(effects: npt.NDArray[np.floating], variances: npt.NDArray[np.floating],
                  dofs: npt.ArrayLike, tail: stats.Tail = "two-sided") -> FixedEffectsResult:
    """Inverse-variance weighted combination of run contrasts.

    Parameters
    ----------
    effects : ndarray, shape (n_runs, n_voxels)
        Contrast effect c'b of each run; NaN where the run is missing.
    variances : ndarray, shape (n_runs, n_voxels)
        Its variance; NaN or <= 0 where the run is missing.
    dofs : array_like, shape (n_runs,) or (n_runs, n_voxels)
        Residual degrees of freedom of each run.
    tail : {"two-sided", "positive", "negative"}

    Returns
    -------
    FixedEffectsResult

    Notes
    -----
    With :math:`w_r = 1/v_r` over the runs present at a voxel,

    .. math::

        \\hat e = \\frac{\\sum_r w_r e_r}{\\sum_r w_r}, \\quad
        \\operatorname{var}(\\hat e) = \\frac{1}{\\sum_r w_r}, \\quad
        \\nu = \\sum_r \\nu_r, \\quad t = \\hat e / \\sqrt{\\operatorname{var}}

    (Cochran 1954; Hedges & Olkin 1985, ch. 6; Friston et al. 2005 for runs
    of one subject).
    """
    e = np.atleast_2d(np.asarray(effects, dtype=np.float64))
    v = np.atleast_2d(np.asarray(variances, dtype=np.float64))
    if e.shape != v.shape:
        raise ValueError(f"effects {e.shape} and variances {v.shape} differ in shape")
    d = np.asarray(dofs, dtype=np.float64)
    d = np.broadcast_to(d[:, None] if d.ndim == 1 else d, e.shape)
    present = np.isfinite(e) & np.isfinite(v) & (v > 0) & np.isfinite(d) & (d > 0)
    w = np.where(present, 1.0 / np.where(present, v, 1.0), 0.0)
    sum_w = w.sum(axis=0)
    n_runs = present.sum(axis=0)
    any_run = n_runs > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        effect = np.where(any_run, (w * np.where(present, e, 0.0)).sum(axis=0) / sum_w, np.nan)
        variance = np.where(any_run, 1.0 / sum_w, np.nan)
        t = effect / np.sqrt(variance)
    dof = np.where(any_run, np.where(present, d, 0.0).sum(axis=0), np.nan)
    log_p = stats.t_logpvalue(t, dof, tail)
    return FixedEffectsResult(effect=effect, variance=variance, dof=dof, t=t, z=stats.t_to_z(t, dof),
                              p=np.exp(log_p), n_runs=n_runs.astype(np.int64))
