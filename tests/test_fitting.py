"""Tests of glmsteps.fitting: the chunked voxel fit is bit-identical for any chunk size and thread count."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from glmsteps import estimation as est
from glmsteps import fitting

GRID = (9, 10, 11)


def toy_design(n: int) -> tuple[np.ndarray, list[str]]:
    t = np.arange(n)
    task = ((t // 8) % 2).astype(float)
    spike = np.zeros(n)
    spike[20] = 1.0
    X = np.column_stack([task, np.cos(np.pi * (t + 0.5) / n), np.ones(n), spike])
    return X, ["interest", "drift", "intercept", "spike"]


@pytest.mark.parametrize("model, classes", [("ar1", False), ("arp", False), ("ols", False), ("arp", True),
                                            ("ar1", True)])
def test_results_do_not_depend_on_chunk_size_or_threads(model: str, classes: bool) -> None:
    rng = np.random.default_rng(3)
    X, roles = toy_design(60)
    design = est.prepare_design(X, roles)
    v = int(np.prod(GRID))
    Y = (500 + 20 * scipy.signal.lfilter([1.0], [1.0, -0.4], rng.standard_normal((60, v)), axis=0)).astype(np.float32)
    columns = rng.permutation(v)                      # voxels fitted in an order other than the grid's
    factors = est.compute_scale_factors(Y[:, columns].mean(axis=0), "percent")
    labels = rng.integers(0, 3, v) if classes else None
    grid = fitting.VoxelGrid(shape=GRID, flat_index=columns, voxel_size_mm=np.array([3.0, 3.0, 3.0]),
                             classes=labels)
    noise = fitting.NoiseSettings(autocorrelation=model, order=3 if model == "arp" else 1, smoothing_fwhm_mm=6.0,
                                  bin_width=0.01)
    runs = [fitting.fit_voxels(Y, columns, factors, design, noise, size, grid, threads=threads)
            for size, threads in ((7, 1), (1000, 1), (7, 2), (64, 3), (v, 1))]
    for other in runs[:-1]:
        for name in ("beta", "residual_variance", "ar_coef", "bin", "bin_rho", "bin_covariance", "lag1"):
            assert np.array_equal(getattr(other, name), getattr(runs[-1], name)), name
    assert runs[0].beta.dtype == np.float32 and runs[0].ar_coef.shape == (v, noise.order if model != "ols" else 1)


def test_data_given_in_a_list_is_released() -> None:
    rng = np.random.default_rng(4)
    X, roles = toy_design(60)
    design = est.prepare_design(X, roles)
    v = int(np.prod(GRID))
    Y = (500 + rng.standard_normal((60, v))).astype(np.float32)
    holder = [Y]
    grid = fitting.VoxelGrid(shape=GRID, flat_index=np.arange(v), voxel_size_mm=np.ones(3))
    fitting.fit_voxels(holder, np.arange(v), np.ones(v), design, fitting.NoiseSettings("ar1", 1, 0.0, 0.01), 128,
                       grid)
    assert holder == []
