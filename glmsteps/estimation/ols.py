"""OLS of voxel blocks: deterministic products over voxels, scaling, design factors, OLS.

Pure maths: arrays in, arrays out, no file access (see :mod:`glmsteps.estimation`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Literal, Sequence

import numpy as np
import numpy.typing as npt

from ..errors import DesignError, GlmstepsWarning

ScalingMethod = Literal["percent", "grand_mean", "none"]

#: The voxel axis of every matrix product is padded to a multiple of this width.
_COLUMN_BLOCK = 64
#: Voxels per block of :func:`apply_group_matrices` (work memory only; results do not depend on it).
_GROUP_BLOCK = 65536

FloatArray = npt.NDArray[np.float64]


# ---------------------------------------------------------------------------
# deterministic products over voxels
# ---------------------------------------------------------------------------

def multiply_columns(A: npt.ArrayLike, B: npt.NDArray[np.floating]) -> FloatArray:
    """``A @ B`` computed so that each column does not depend on how many columns ``B`` has.

    Parameters
    ----------
    A : array_like, shape (m, k)
    B : ndarray, shape (k, n_voxels)

    Returns
    -------
    ndarray, shape (m, n_voxels), float64

    Notes
    -----
    BLAS matrix products use different micro-kernels for the last, partial
    block of columns, so a column's value can change in the last bit with the
    number of columns. Padding the column count to a multiple of 64 makes every
    column go through a full block, and giving BLAS ``B`` in C order always
    keeps it on the same kernel (a gathered, column-major ``B`` takes another),
    which makes chunked and whole-array results identical (checked in
    ``tests/test_estimation.py`` and ``tests/test_fitting.py``).
    """
    A = np.asarray(A, dtype=np.float64)
    n = B.shape[1]
    padded = -(-n // _COLUMN_BLOCK) * _COLUMN_BLOCK
    if padded == n:
        # C order always: BLAS takes another kernel (other rounding) for a column-major operand
        return A @ np.ascontiguousarray(B, dtype=np.float64)
    Bp = np.zeros((B.shape[0], padded), dtype=np.float64)
    Bp[:, :n] = B
    return (A @ Bp)[:, :n]


def apply_group_matrices(matrices: FloatArray, group: npt.NDArray[np.integer], Z: FloatArray) -> FloatArray:
    """``out[:, v] = matrices[group[v]] @ Z[:, v]`` with element-wise arithmetic (chunk independent).

    Parameters
    ----------
    matrices : ndarray, shape (n_groups, m, k)
    group : ndarray of int, shape (n_voxels,)
    Z : ndarray, shape (k, n_voxels)

    Returns
    -------
    ndarray, shape (m, n_voxels), float64

    Notes
    -----
    Group by group, so that each group's matrix is broadcast instead of
    gathered for every voxel (the same products and sums, in the same order,
    as a per-voxel matrix-vector product, whatever the other voxels).
    """
    group = np.asarray(group)
    out = np.empty((matrices.shape[1], Z.shape[1]))
    for start in range(0, group.size, _GROUP_BLOCK):      # bounded work memory for whole-brain arrays
        part = slice(start, min(start + _GROUP_BLOCK, group.size))
        order = np.argsort(group[part], kind="stable")
        Zs = np.asarray(Z[:, part], dtype=np.float64)[:, order]
        keys, starts = np.unique(group[part][order], return_index=True)
        for b, lo, hi in zip(keys, starts, np.r_[starts[1:], order.size]):
            Zb = Zs[:, lo:hi]
            acc = matrices[b, :, 0, None] * Zb[0]
            for j in range(1, matrices.shape[2]):
                acc += matrices[b, :, j, None] * Zb[j]
            out[:, start + order[lo:hi]] = acc
    return out


# ---------------------------------------------------------------------------
# scaling
# ---------------------------------------------------------------------------

def compute_scale_factors(mean_signal: npt.ArrayLike, method: ScalingMethod,
                          grand_mean_value: float = 100.0) -> FloatArray:
    """Per-voxel factors that scale a run's signal.

    Parameters
    ----------
    mean_signal : array_like, shape (n_voxels,)
        Temporal mean of each fitted voxel over the kept volumes (image units).
    method : {"percent", "grand_mean", "none"}
        ``percent``: ``100 / mean`` per voxel, so the scaled series has mean 100
        and a beta of 1 is a 1 % signal change. ``grand_mean``: one factor for
        the whole run, ``grand_mean_value / mean(mean_signal)``, so the mean over
        the mask of the temporal means becomes ``grand_mean_value``. ``none``:
        factors of 1.
    grand_mean_value : float
        Target grand mean (default 100).

    Returns
    -------
    ndarray, shape (n_voxels,), float64
        Multiply ``Y`` column-wise by these.

    Notes
    -----
    Percent signal change, ``100 * y / mean(y)``, and grand-mean scaling of the
    whole mask to a common value (100 by default) are common practice. The
    grand mean is taken over the fitted voxels only (inside the mask, finite,
    non-constant), not over the whole image.
    """
    mean_signal = np.asarray(mean_signal, dtype=np.float64)
    if method == "percent":
        with np.errstate(divide="ignore"):
            return 100.0 / mean_signal
    if method == "grand_mean":
        grand = float(np.mean(mean_signal)) if mean_signal.size else 1.0
        return np.full(mean_signal.shape, grand_mean_value / grand)
    if method == "none":
        return np.ones(mean_signal.shape)
    raise ValueError(f"unknown scaling method {method!r}")


# ---------------------------------------------------------------------------
# design preparation
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class DesignFactors:
    """Everything about a design that the voxel fits reuse.

    Attributes
    ----------
    X : ndarray, shape (n_scans, n_regressors), float64
    pinv : ndarray, shape (n_regressors, n_scans)
        Moore-Penrose pseudo-inverse of ``X`` (SVD).
    rank : int
    dof : int
        ``n_scans - rank``.
    censored : ndarray of bool, shape (n_scans,)
        Volumes that carry their own indicator (``spike``) column.
    spike_columns : ndarray of bool, shape (n_regressors,)
    spike_rows : ndarray of int, shape (n_spikes,)
        For each spike column (in order), the volume it marks.
    lag_design : ndarray, shape (n_scans, n_regressors)
        ``D1 @ X`` with ``D1`` the symmetric lag-1 matrix (ones on both first
        off-diagonals).
    column_basis : ndarray, shape (n_scans, rank)
        Orthonormal basis of the columns of ``X`` (left singular vectors), so
        that the residual-forming matrix is ``I - column_basis column_basis'``.
    """

    X: FloatArray
    pinv: FloatArray
    rank: int
    dof: int
    censored: npt.NDArray[np.bool_]
    spike_columns: npt.NDArray[np.bool_]
    spike_rows: npt.NDArray[np.int64]
    lag_design: FloatArray
    column_basis: FloatArray


def prepare_design(X: npt.ArrayLike, roles: Sequence[str]) -> DesignFactors:
    """Factor a design for repeated voxel fits.

    Parameters
    ----------
    X : array_like, shape (n_scans, n_regressors)
        The design of the kept volumes.
    roles : sequence of str, length n_regressors
        Column roles; ``spike`` columns must be single-volume indicators.

    Returns
    -------
    DesignFactors

    Raises
    ------
    DesignError
        If a spike column is not 1 at exactly one volume and 0 elsewhere, or if
        the design leaves no residual degrees of freedom.

    Warns
    -----
    GlmstepsWarning
        If the design is rank deficient (estimates then use the pseudo-inverse).
    """
    X = np.asarray(X, dtype=np.float64)
    n, p = X.shape
    roles = list(roles)
    spike_columns = np.array([r == "spike" for r in roles], dtype=bool)
    spike_rows = []
    for j in np.flatnonzero(spike_columns):
        nz = np.flatnonzero(X[:, j] != 0)
        if nz.size != 1 or X[nz[0], j] != 1.0:
            raise DesignError(f"design column {j} (role spike) is not 1 at exactly one volume and 0 elsewhere; "
                              "rebuild the design")
        spike_rows.append(int(nz[0]))
    censored = np.zeros(n, dtype=bool)
    censored[spike_rows] = True
    U, s, Vt = np.linalg.svd(X, full_matrices=False)
    tol = s.max(initial=0.0) * max(n, p) * np.finfo(np.float64).eps
    keep = s > tol
    rank = int(keep.sum())
    pinv = (Vt[keep].T / s[keep]) @ U[:, keep].T
    if rank < p:
        warnings.warn(f"design has {p} columns but rank {rank}; estimates use the pseudo-inverse and only "
                      "estimable contrasts are meaningful", GlmstepsWarning, stacklevel=2)
    dof = n - rank
    if dof < 1:
        raise DesignError(f"design has {n} volumes and rank {rank}: no residual degrees of freedom; "
                          "use fewer regressors or more volumes")
    lag = np.zeros_like(X)
    lag[1:] += X[:-1]
    lag[:-1] += X[1:]
    return DesignFactors(X=X, pinv=pinv, rank=rank, dof=dof, censored=censored, spike_columns=spike_columns,
                         spike_rows=np.asarray(spike_rows, dtype=np.int64), lag_design=lag,
                         column_basis=np.ascontiguousarray(U[:, keep]))


# ---------------------------------------------------------------------------
# OLS
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class OlsBlock:
    """OLS results of a block of voxels.

    Attributes
    ----------
    beta : ndarray, shape (n_regressors, n_voxels), float64
    residuals : ndarray, shape (n_scans, n_voxels), float64
        Exactly zero at censored volumes.
    residual_variance : ndarray, shape (n_voxels,)
        ``sum(residuals**2) / dof``.
    """

    beta: FloatArray
    residuals: FloatArray
    residual_variance: FloatArray


def fit_ols(design: DesignFactors, Y: npt.NDArray[np.floating]) -> OlsBlock:
    """Ordinary least squares of a block of voxels.

    Parameters
    ----------
    design : DesignFactors
    Y : ndarray, shape (n_scans, n_voxels)
        Scaled signal.

    Returns
    -------
    OlsBlock

    Notes
    -----
    ``beta = pinv(X) y``, ``e = y - X beta``, ``sigma^2 = e'e / (n - rank X)``
    (any linear-models text, e.g. Seber & Lee (2003) *Linear Regression
    Analysis*, ch. 3).
    """
    Y = np.asarray(Y, dtype=np.float64)
    beta = multiply_columns(design.pinv, Y)
    residuals = multiply_columns(design.X, beta)
    np.subtract(Y, residuals, out=residuals)
    residuals[design.censored] = 0.0
    rss = np.einsum("tv,tv->v", residuals, residuals)
    return OlsBlock(beta=beta, residuals=residuals, residual_variance=rss / design.dof)
