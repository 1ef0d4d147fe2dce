"""Spatial smoothing of AR estimates within the mask and within tissue classes (normalised convolution).

Pure maths: arrays in, arrays out, no file access (see :mod:`glmsteps.estimation`).
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

from .ols import FloatArray

#: Default FWHM of the AR smoothing, in voxel widths (``config/schema.yaml`` fit.ar_smoothing_fwhm_mm: null).
DEFAULT_SMOOTHING_VOXELS = 2.0


def default_smoothing_fwhm_mm(voxel_size_mm: npt.ArrayLike) -> float:
    """The default FWHM (mm) of the AR smoothing: :data:`DEFAULT_SMOOTHING_VOXELS` voxel widths.

    Parameters
    ----------
    voxel_size_mm : array_like, shape (3,)
        Voxel sides (mm).

    Returns
    -------
    float
        Twice the geometric mean of the voxel sides (mm).

    Notes
    -----
    The width is tied to the voxels, not to millimetres, because what keeps the whitening's
    sampling noise small is the number of voxels each estimate pools: measured on the toy study
    (4 mm voxels, 120 volumes, AR(1) 0.3 noise, AR(8) model), 5 mm left the null z SD of a
    block contrast at 1.020 and p < 0.001 at 1.8x nominal; 8 mm gave 1.004 and 1.2x
    (``tests/test_workflow.py``, ``tests/test_calibration.py``).
    """
    sides = np.abs(np.asarray(voxel_size_mm, dtype=np.float64))
    return float(DEFAULT_SMOOTHING_VOXELS * np.exp(np.mean(np.log(sides))))


def gaussian_kernel(sigma: float, truncate: float = 4.0) -> FloatArray:
    """Normalised 1D Gaussian weights.

    Parameters
    ----------
    sigma : float
        Standard deviation (voxels).
    truncate : float
        The kernel reaches ``int(truncate * sigma + 0.5)`` voxels each side.

    Returns
    -------
    ndarray, shape (2 r + 1,)
        ``exp(-x^2 / (2 sigma^2))`` for ``x = -r..r``, summing to 1.
    """
    radius = int(truncate * sigma + 0.5)
    x = np.arange(-radius, radius + 1, dtype=np.float64)
    w = np.exp(-0.5 * (x / sigma) ** 2) if sigma > 0 else (x == 0).astype(np.float64)
    return w / w.sum()


def convolve_axis(values: FloatArray, weights: FloatArray, axis: int) -> FloatArray:
    """Convolve along one axis with a symmetric kernel, zero outside the array.

    Parameters
    ----------
    values : ndarray, float64
    weights : ndarray, shape (2 r + 1,)
        Symmetric weights (``weights[r + k] == weights[r - k]``).
    axis : int

    Returns
    -------
    ndarray, same shape as ``values``, float64
    """
    a = np.moveaxis(values, axis, 0)
    r = (weights.size - 1) // 2
    out = weights[r] * a
    for k in range(1, min(r, a.shape[0] - 1) + 1):
        out[:-k] += weights[r + k] * a[k:]
        out[k:] += weights[r - k] * a[:-k]
    return np.moveaxis(out, 0, axis)


def smooth_voxel_values(values: npt.NDArray[np.floating], flat_index: npt.NDArray[np.integer],
                        shape: tuple[int, int, int], fwhm_mm: float, voxel_size_mm: npt.ArrayLike,
                        classes: npt.NDArray[np.integer] | None = None,
                        out: FloatArray | None = None) -> FloatArray:
    """Smooth per-voxel values within the fitted voxels, and within tissue classes when given.

    Parameters
    ----------
    values : ndarray, shape (k, n_voxels)
        ``k`` values of each fitted voxel (for example its autocorrelations at lags 1..k).
    flat_index : ndarray of int, shape (n_voxels,)
        C-order flat index of each voxel in the grid ``shape``.
    shape : tuple of 3 int
    fwhm_mm : float
        Full width at half maximum of the Gaussian kernel (mm); 0 returns the values.
    voxel_size_mm : array_like, shape (3,)
    classes : ndarray of int, shape (n_voxels,), optional
        Tissue class of each voxel. A voxel's smoothed value is then a
        weighted mean over the voxels of its own class only.
    out : ndarray, shape (k, n_voxels), float64, optional
        Where to write the result (may be ``values`` itself: rows are smoothed one at a time).

    Returns
    -------
    ndarray, shape (k, n_voxels), float64

    Notes
    -----
    ``s = G * (m v) / G * m`` with ``G`` the Gaussian kernel, ``sigma = FWHM /
    sqrt(8 ln 2)``, truncated at 4 sigma, and ``m`` the mask of the fitted
    voxels of the class: normalised convolution (Knutsson & Westin (1993),
    "Normalized and differential convolution", CVPR), so that values near the
    edge of the mask or of a class are averaged over the class only and not
    pulled toward zero or toward the neighbouring class. Separable numpy
    convolution, one row at a time: the fit step then needs no scipy, whose import alone
    (0.3-0.4 s) weighed on small runs (``tests/benchmarks/README.md``).
    Checked against ``scipy.ndimage.gaussian_filter`` in ``tests/test_estimation.py``.
    """
    values = np.atleast_2d(np.asarray(values, dtype=np.float64))
    flat = np.asarray(flat_index, dtype=np.int64)
    if out is None:
        out = np.empty_like(values)
    if fwhm_mm <= 0 or values.shape[1] == 0:
        out[...] = values
        return out
    k = values.shape[0]
    shape = tuple(int(x) for x in shape)
    sigma = fwhm_mm / math.sqrt(8.0 * math.log(2.0)) / np.asarray(voxel_size_mm, dtype=np.float64)
    kernels = [gaussian_kernel(float(s)) for s in sigma]
    labels = np.zeros(flat.size, dtype=np.int64) if classes is None else np.asarray(classes, dtype=np.int64)

    def convolve(grid: FloatArray) -> FloatArray:
        for axis, w in enumerate(kernels):
            grid = convolve_axis(grid, w, axis)
        return grid

    for c in np.unique(labels):
        sel = np.flatnonzero(labels == c)
        grid = np.zeros(shape)
        grid.flat[flat[sel]] = 1.0
        weight = convolve(grid).flat[flat[sel]]
        for row in range(k):                     # one grid at a time: a whole-brain grid per row is large
            grid = np.zeros(shape)
            grid.flat[flat[sel]] = values[row, sel]
            out[row, sel] = convolve(grid).flat[flat[sel]] / weight
    return out
