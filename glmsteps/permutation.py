"""Permutation inference for group contrasts (pure maths, no file access).

Family-wise error control from the permutation distribution of maximum
statistics (Nichols & Holmes 2002, Hum Brain Mapp 15:1), which does not rest
on the random-field assumptions found to inflate cluster false positives by
Eklund, Nichols & Knutsson (2016, PNAS 113:7900).

- ``sign_flip``: one-sample designs (each subject flipped independently) and
  paired designs (both members of a pair flipped together, which swaps the
  pair's group labels); assumes symmetric errors.
- ``permute``: permutation of rows for all other designs; assumes
  exchangeable errors (no restriction of permutations within sites).

Both use the Freedman-Lane procedure (Freedman & Lane 1983; Winkler et al.
2014, NeuroImage 92:381, table 2): the data are split into the fit and
residuals of the reduced model under H0 (columns X C_u, C_u spanning the null
space of c'), the residuals are permuted or sign-flipped and added back to the
reduced fit, and the full model is refitted. With no nuisance columns this is
plain permutation / sign flipping of the data.

The statistic is the OLS t of ``c``; the test follows ``tail``:
``positive`` (large t is evidence), ``negative`` (large -t) or ``two-sided``
(large |t|: the maximum statistic is max |t|, clusters are formed on each
sign separately at |t| above the threshold and compete in one maximum, TFCE
is computed for each sign). Draws are random with replacement from a seeded
generator; draw 0 is always the identity, so every p value is at least
1 / n_permutations.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import numpy.typing as npt
from scipy import linalg, ndimage

import pandas as pd

from .clusters import (PERMUTATION_COLUMNS, Connectivity, SpatialGrid, cluster_extent_mass, cluster_table,
                       make_spatial_grid, relabel_by_size)
from .stats import TAILS, Tail

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
Method = Literal["sign_flip", "permute"]

LOGGER = logging.getLogger("glmsteps")

#: Default TFCE parameters (Smith & Nichols 2009, NeuroImage 44:83).
TFCE_EXTENT_POWER = 0.5
TFCE_HEIGHT_POWER = 2.0


# ---------------------------------------------------------------------------
# permutation sets
# ---------------------------------------------------------------------------

def make_sign_flips(blocks: npt.ArrayLike, n_permutations: int, seed: int) -> FloatArray:
    """Random sign flips by block; row 0 is the identity.

    Parameters
    ----------
    blocks : array_like of int, shape (n_subjects,)
        Block of each subject; subjects of a block share one sign.
    n_permutations : int
        Number of draws including the identity.
    seed : int

    Returns
    -------
    signs : ndarray, shape (n_permutations, n_subjects), values +-1
    """
    blocks = np.asarray(blocks)
    _, block_index = np.unique(blocks, return_inverse=True)
    rng = np.random.default_rng(seed)
    per_block = rng.choice(np.array([-1.0, 1.0]), size=(n_permutations, block_index.max() + 1))
    per_block[0] = 1.0
    return per_block[:, block_index.reshape(-1)]


def make_row_permutations(n_subjects: int, n_permutations: int, seed: int) -> IntArray:
    """Random permutations of rows; row 0 is the identity.

    Returns
    -------
    order : ndarray of int, shape (n_permutations, n_subjects)
        ``Y_perm = Y[order[b]]``.
    """
    rng = np.random.default_rng(seed)
    order = np.empty((n_permutations, n_subjects), dtype=np.int64)
    order[0] = np.arange(n_subjects)
    for b in range(1, n_permutations):
        order[b] = rng.permutation(n_subjects)
    return order


# ---------------------------------------------------------------------------
# Freedman-Lane
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class FreedmanLaneModel:
    """Quantities of the full and reduced models needed for every permutation.

    Attributes
    ----------
    contrast_weights : ndarray, shape (n_subjects,)
        a = pinv(X)' c, so that c' beta = a' y.
    basis : ndarray, shape (n_subjects, rank)
        Orthonormal basis of the column space of X.
    reduced_projector : ndarray, shape (n_subjects, n_subjects)
        Hat matrix of the reduced model X C_u.
    dof : float
        n - rank(X).
    """

    contrast_weights: FloatArray
    basis: FloatArray
    reduced_projector: FloatArray
    dof: float


def build_freedman_lane(X: FloatArray, c: FloatArray) -> FreedmanLaneModel:
    """Prepare the Freedman-Lane split for design ``X`` and contrast ``c``.

    Parameters
    ----------
    X : ndarray, shape (n_subjects, n_regressors)
    c : ndarray, shape (n_regressors,)

    Notes
    -----
    Reduced model under H0: c' beta = 0 <=> beta = C_u g with C_u an orthonormal
    basis of null(c'), so its columns are X C_u (Winkler et al. 2014, appendix A).
    """
    X = np.asarray(X, dtype=np.float64)
    c = np.asarray(c, dtype=np.float64)
    A = np.linalg.pinv(X)
    u, s, _ = np.linalg.svd(X, full_matrices=False)
    rank = int(np.sum(s > s.max() * max(X.shape) * np.finfo(np.float64).eps))
    null = linalg.null_space(c[None, :])
    Z = X @ null
    reduced = Z @ np.linalg.pinv(Z) if Z.size else np.zeros((X.shape[0], X.shape[0]))
    return FreedmanLaneModel(contrast_weights=A.T @ c, basis=u[:, :rank], reduced_projector=reduced,
                             dof=float(X.shape[0] - rank))


def t_from_operators(model: FreedmanLaneModel, operators: FloatArray, resid: FloatArray,
                     fitted_effect: FloatArray, total_ss: FloatArray) -> FloatArray:
    """t of the contrast for a block of permutations, as one matrix product.

    Parameters
    ----------
    model : FreedmanLaneModel
    operators : ndarray, shape (n_block, 1 + rank, n_subjects)
        For permutation matrix P: rows a' P and the basis' columns' Q' P.
    resid : ndarray, shape (n_subjects, n_voxels)
        Reduced-model residuals R.
    fitted_effect : ndarray, shape (n_voxels,)
        a' F, the contrast of the reduced-model fit F (zero for full-rank X).
    total_ss : ndarray, shape (n_voxels,)
        ||R||^2 per voxel.

    Returns
    -------
    t : ndarray, shape (n_block, n_voxels)

    Notes
    -----
    With Y* = P R + F and F in the column space of X: c'b* = a'P R + a'F and
    RSS* = ||P R||^2 - ||Q'P R||^2 = ||R||^2 - ||Q'P R||^2 (P orthogonal), so
    t* = c'b* / sqrt(RSS* / dof * a'a).
    """
    n_block, rows, n = operators.shape
    prod = (operators.reshape(n_block * rows, n) @ resid).reshape(n_block, rows, -1)
    effect = prod[:, 0, :] + fitted_effect[None, :]
    rss = np.maximum(total_ss[None, :] - np.einsum("brv,brv->bv", prod[:, 1:, :], prod[:, 1:, :]), 0.0)
    scale = float(model.contrast_weights @ model.contrast_weights) / model.dof
    with np.errstate(divide="ignore", invalid="ignore"):
        t = effect / np.sqrt(rss * scale)
    return np.where(rss > 0, t, np.nan)


def permutation_operators(model: FreedmanLaneModel, method: Method, draws: np.ndarray) -> FloatArray:
    """Stack a' P and Q' P for a block of sign flips or row permutations.

    Parameters
    ----------
    draws : ndarray, shape (n_block, n_subjects)
        Signs (``sign_flip``) or row orders (``permute``; Y* = Y[order]).

    Returns
    -------
    ndarray, shape (n_block, 1 + rank, n_subjects)
    """
    base = np.vstack([model.contrast_weights[None, :], model.basis.T])      # (1 + r, n)
    if method == "sign_flip":
        return base[None, :, :] * draws[:, None, :]
    # (P R)_i = R[order_i]  =>  (w' P)_j = w[inverse_order_j]
    inverse = np.argsort(draws, axis=1)
    return base[:, inverse].transpose(1, 0, 2)


# ---------------------------------------------------------------------------
# spatial statistics
# ---------------------------------------------------------------------------

def tfce_scores(values: FloatArray, grid: SpatialGrid, step: float = 0.1,
                extent_power: float = TFCE_EXTENT_POWER, height_power: float = TFCE_HEIGHT_POWER) -> FloatArray:
    """Threshold-free cluster enhancement of positive values.

    Parameters
    ----------
    values : ndarray, shape (n_voxels,)
    grid : SpatialGrid
    step : float
        Height step dh (statistic units). Fixed, not data dependent, so every
        permutation is integrated on the same heights.
    extent_power, height_power : float
        E and H.

    Returns
    -------
    ndarray, shape (n_voxels,)

    Notes
    -----
    TFCE(v) = sum_{k >= 1, k dh <= s(v)} e_k(v)^E (k dh)^H dh, where e_k(v) is the
    voxel count of the cluster containing v among voxels with s >= k dh
    (Smith & Nichols 2009, NeuroImage 44:83, eq. 1 as a right Riemann sum).
    """
    clean = np.nan_to_num(np.asarray(values, dtype=np.float64), nan=-np.inf)
    scores = np.zeros(clean.shape)
    top = np.max(clean) if clean.size else 0.0
    if not np.isfinite(top) or top < step:
        return scores
    n_steps = int(np.floor(top / step + 1e-9))
    volume = np.zeros(int(np.prod(grid.shape)), dtype=bool)
    for k in range(1, n_steps + 1):
        h = k * step
        supra = clean >= h - 1e-12 * step
        volume[:] = False
        volume[grid.index] = supra
        labelled, n_clusters = ndimage.label(volume.reshape(grid.shape), structure=grid.structure)
        labels = labelled.reshape(-1)[grid.index]
        extent = np.bincount(labels, minlength=n_clusters + 1).astype(np.float64)
        scores[supra] += extent[labels[supra]] ** extent_power * h**height_power * step
    return scores


def oriented(t: FloatArray, tail: Tail) -> FloatArray:
    """The statistic whose large values are evidence for ``tail``: t, -t or |t|."""
    if tail == "positive":
        return t
    if tail == "negative":
        return -t
    return np.abs(t)


def signed_clusters(t: FloatArray, threshold: float, grid: SpatialGrid, tail: Tail
                    ) -> tuple[IntArray, FloatArray, FloatArray, FloatArray]:
    """Clusters for ``tail``: extent, mass (of the oriented statistic) and sign of each.

    Positive clusters are voxels with t > threshold, negative ones t < -threshold;
    ``two-sided`` labels both signs apart (they never join) and numbers the
    negative clusters after the positive ones.

    Returns
    -------
    labels : ndarray of int, shape (n_voxels,)
    extent, mass, sign : ndarray, shape (n_clusters,)
    """
    parts = []
    if tail in ("positive", "two-sided"):
        parts.append((1.0, cluster_extent_mass(t, threshold, grid)))
    if tail in ("negative", "two-sided"):
        parts.append((-1.0, cluster_extent_mass(-t, threshold, grid)))
    labels = np.zeros(t.shape, dtype=np.int64)
    extents, masses, signs = [], [], []
    offset = 0
    for sign, (lab, extent, mass) in parts:
        labels = np.where(lab > 0, lab + offset, labels)
        offset += extent.size
        extents.append(extent)
        masses.append(mass)
        signs.append(np.full(extent.size, sign))
    return labels, np.concatenate(extents), np.concatenate(masses), np.concatenate(signs)


def tfce_for_tail(t: FloatArray, grid: SpatialGrid, tail: Tail, step: float) -> FloatArray:
    """TFCE of the evidence for ``tail``: of t, of -t, or of each sign apart (magnitudes, >= 0)."""
    if tail == "positive":
        return tfce_scores(t, grid, step)
    if tail == "negative":
        return tfce_scores(-t, grid, step)
    positive = tfce_scores(t, grid, step)
    negative = tfce_scores(-t, grid, step)
    return np.where(np.nan_to_num(t) >= 0, positive, negative)


# ---------------------------------------------------------------------------
# the test
# ---------------------------------------------------------------------------

@dataclass
class PermutationResult:
    """Observed statistics and their family-wise error p values.

    All per-voxel arrays have shape (n_voxels,); per-cluster arrays (n_clusters,),
    cluster k at index k - 1 (``cluster_sign`` +1 for clusters of positive t,
    -1 for negative); maxima have shape (n_permutations,). ``max_t`` holds the
    maxima of the oriented statistic (t, -t or |t| for the tail).
    """

    t: FloatArray
    p_fwe: FloatArray
    max_t: FloatArray
    cluster_threshold: float
    labels: IntArray
    extent: FloatArray
    mass: FloatArray
    p_fwe_extent: FloatArray
    p_fwe_mass: FloatArray
    max_extent: FloatArray
    max_mass: FloatArray
    cluster_sign: FloatArray = field(default_factory=lambda: np.zeros(0))
    tfce: FloatArray | None = None
    p_fwe_tfce: FloatArray | None = None
    max_tfce: FloatArray | None = None
    dof: float = 0.0
    n_permutations: int = 0
    method: str = ""
    tail: str = "two-sided"
    extra: dict = field(default_factory=dict)


def fwe_p_values(observed: FloatArray, maxima: FloatArray) -> FloatArray:
    """FWE-corrected p: fraction of permutation maxima >= the observed value.

    Notes
    -----
    p(v) = #{b : max_b >= s(v)} / B, the identity included among the B draws
    (Nichols & Holmes 2002, sec. "Multiple comparisons").
    """
    ordered = np.sort(np.asarray(maxima, dtype=np.float64))
    obs = np.asarray(observed, dtype=np.float64)
    count = ordered.size - np.searchsorted(ordered, obs, side="left")
    p = count / ordered.size
    return np.where(np.isfinite(obs), p, np.nan)


def run_permutation_test(X: FloatArray, Y: FloatArray, c: FloatArray, voxel_index: npt.ArrayLike,
                         shape: tuple[int, ...], method: Method, n_permutations: int, seed: int,
                         cluster_threshold: float, blocks: npt.ArrayLike | None = None, tfce: bool = False,
                         tfce_step: float = 0.1, connectivity: Connectivity = 26, memory_mb: float = 64.0,
                         progress: Callable[[int, int], None] | None = None,
                         tail: Tail = "two-sided") -> PermutationResult:
    """Permutation test of a group contrast with voxel, cluster and TFCE FWE p values.

    Parameters
    ----------
    X : ndarray, shape (n_subjects, n_regressors)
    Y : ndarray, shape (n_subjects, n_voxels)
        Finite subjects' effects at the analysed voxels.
    c : ndarray, shape (n_regressors,)
    voxel_index : ndarray of int, shape (n_voxels,)
        Flat C-order indices of the voxels in ``shape`` (for clusters).
    shape : tuple of int
        Grid shape (voxels).
    method : {'sign_flip', 'permute'}
    n_permutations : int
        Draws including the identity.
    seed : int
    cluster_threshold : float
        Cluster-forming threshold on the oriented statistic (t, -t or |t|; see
        :func:`glmsteps.stats.t_critical`).
    blocks : array_like of int, shape (n_subjects,), optional
        Sign-flip blocks (pairs); each subject alone by default.
    tfce : bool
        Also compute TFCE and its FWE p.
    tfce_step : float
        TFCE height step dh (t units).
    connectivity : {6, 18, 26}
    memory_mb : float
        Bound on the block of permuted statistics held at once.
    progress : callable(done, total), optional
        Called after each block.
    tail : {"two-sided", "positive", "negative"}
        Alternative hypothesis (see the module docstring).

    Returns
    -------
    PermutationResult
    """
    if tail not in TAILS:
        raise ValueError(f"tail must be one of {TAILS}, got {tail!r}")
    X = np.asarray(X, dtype=np.float64)
    Y = np.asarray(Y, dtype=np.float64)
    n, n_vox = Y.shape
    model = build_freedman_lane(X, c)
    fitted = model.reduced_projector @ Y
    resid = Y - fitted
    fitted_effect = model.contrast_weights @ fitted
    total_ss = np.einsum("nv,nv->v", resid, resid)
    if method == "sign_flip":
        draws: np.ndarray = make_sign_flips(np.arange(n) if blocks is None else blocks, n_permutations, seed)
    else:
        draws = make_row_permutations(n, n_permutations, seed)
    grid = make_spatial_grid(voxel_index, shape, connectivity)
    rows = 1 + model.basis.shape[1]
    block = max(1, int(memory_mb * 2**20 // (8 * rows * max(n_vox, 1) * 2)))
    max_t = np.empty(n_permutations)
    max_extent = np.zeros(n_permutations)
    max_mass = np.zeros(n_permutations)
    max_tfce = np.zeros(n_permutations) if tfce else None
    observed_t = None
    for start in range(0, n_permutations, block):
        stop = min(start + block, n_permutations)
        ops = permutation_operators(model, method, draws[start:stop])
        t_block = t_from_operators(model, ops, resid, fitted_effect, total_ss)
        if start == 0:
            observed_t = t_block[0].copy()
        clean = np.nan_to_num(oriented(t_block, tail), nan=-np.inf)
        max_t[start:stop] = clean.max(axis=1) if n_vox else -np.inf
        for i in range(stop - start):
            _, extent, mass, _ = signed_clusters(t_block[i], cluster_threshold, grid, tail)
            if extent.size:
                max_extent[start + i] = extent.max()
                max_mass[start + i] = mass.max()
            if max_tfce is not None:
                max_tfce[start + i] = tfce_for_tail(t_block[i], grid, tail, tfce_step).max(initial=0.0)
        if progress is not None:
            progress(stop, n_permutations)
    assert observed_t is not None
    labels, extent, mass, sign = signed_clusters(observed_t, cluster_threshold, grid, tail)
    result = PermutationResult(
        t=observed_t, p_fwe=fwe_p_values(oriented(observed_t, tail), max_t), max_t=max_t,
        cluster_threshold=float(cluster_threshold), labels=labels, extent=extent, mass=mass,
        p_fwe_extent=fwe_p_values(extent, max_extent), p_fwe_mass=fwe_p_values(mass, max_mass),
        max_extent=max_extent, max_mass=max_mass, cluster_sign=sign, dof=model.dof,
        n_permutations=n_permutations, method=method, tail=tail)
    if tfce and max_tfce is not None:
        scores = tfce_for_tail(observed_t, grid, tail, tfce_step)
        result.tfce = scores
        result.p_fwe_tfce = np.where(np.isfinite(observed_t), fwe_p_values(scores, max_tfce), np.nan)
        result.max_tfce = max_tfce
    return result


def log_progress(done: int, total: int) -> None:
    """Progress callback writing to the ``glmsteps`` logger."""
    LOGGER.info("permutations: %d / %d", done, total)


def observed_cluster_table(result: PermutationResult, voxel_index: npt.ArrayLike, shape: tuple[int, int, int],
                           affine: npt.ArrayLike, subpeaks: int, subpeak_spacing_mm: float
                           ) -> tuple[pd.DataFrame, IntArray]:
    """The observed clusters in the one cluster-table format, largest first, with their FWE p.

    Parameters
    ----------
    result : PermutationResult
    voxel_index : ndarray of int, shape (n_voxels,)
        Flat C-order indices of the tested voxels in ``shape``.
    shape : tuple of 3 int
    affine : array_like, shape (4, 4)
    subpeaks, subpeak_spacing_mm
        See :func:`glmsteps.clusters.cluster_table`.

    Returns
    -------
    table : DataFrame
        :func:`glmsteps.clusters.cluster_table` of the observed t map plus
        :data:`glmsteps.clusters.PERMUTATION_COLUMNS` (``mass``, ``p_fwe_extent``,
        ``p_fwe_mass``).
    numbers : ndarray of int, shape (n_voxels,)
        Each tested voxel's row (``cluster_id``), 0 outside clusters.
    """
    index = np.asarray(voxel_index, dtype=np.int64)
    labels3d = np.zeros(int(np.prod(shape)), dtype=np.int64)
    labels3d[index] = result.labels
    labels3d = labels3d.reshape(shape)
    ordered, n = relabel_by_size(labels3d, labels3d > 0)
    t3d = np.full(int(np.prod(shape)), np.nan)
    t3d[index] = result.t
    table = cluster_table(t3d.reshape(shape), ordered, affine, subpeaks, subpeak_spacing_mm)
    numbers = ordered.reshape(-1)[index].astype(np.int64)
    old_of_new = np.zeros(n, dtype=np.int64)
    inside = numbers > 0
    old_of_new[numbers[inside] - 1] = result.labels[inside] - 1
    for column, values in zip(PERMUTATION_COLUMNS, (result.mass, result.p_fwe_extent, result.p_fwe_mass)):
        table[column] = np.asarray(values, dtype=np.float64)[old_of_new]
    return table, numbers
