"""Spatial smoothing of AR estimates within a mask (normalised convolution).

Pure maths: arrays in, arrays out, no file access (see :mod:`glmsteps.estimation`).
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

from .ols import FloatArray


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


def smooth_within_mask(values: npt.NDArray[np.floating], mask: npt.NDArray[np.bool_], fwhm_mm: float,
                       voxel_size_mm: npt.ArrayLike) -> FloatArray:
    """Gaussian smoothing restricted to a mask (normalised convolution).

    Parameters
    ----------
    values : ndarray, shape (nx, ny, nz)
        Values; only those inside ``mask`` are used.
    mask : ndarray of bool, shape (nx, ny, nz)
    fwhm_mm : float
        Full width at half maximum of the kernel (mm); 0 returns the input.
    voxel_size_mm : array_like, shape (3,)

    Returns
    -------
    ndarray, shape (nx, ny, nz), float64
        Smoothed values inside the mask, 0 outside.

    Notes
    -----
    ``s = G * (m v) / G * m`` with ``G`` the Gaussian kernel, ``sigma = FWHM /
    sqrt(8 ln 2)``, truncated at 4 sigma: normalised convolution (Knutsson &
    Westin (1993), "Normalized and differential convolution", CVPR), so that
    values near the mask edge are averaged over the mask only and not pulled
    toward zero. The separable convolution is done with numpy slices: the fit
    job then needs no scipy, whose import alone (0.3-0.4 s) weighed on small
    runs (``tests/benchmarks/README.md``).
    """
    m = np.asarray(mask, dtype=bool)
    vals = np.where(m, np.asarray(values, dtype=np.float64), 0.0)
    if fwhm_mm <= 0:
        return vals
    sigma = fwhm_mm / math.sqrt(8.0 * math.log(2.0)) / np.asarray(voxel_size_mm, dtype=np.float64)
    den = m.astype(np.float64)
    for axis in range(m.ndim):
        w = gaussian_kernel(float(sigma[axis]))
        vals = convolve_axis(vals, w, axis)
        den = convolve_axis(den, w, axis)
    np.divide(vals, den, out=vals, where=m & (den > 0))
    vals[~m] = 0.0
    return vals

