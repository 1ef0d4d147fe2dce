"""Null and planted-effect simulations of the run-level fit (shared by tests/test_calibration.py and
tests/benchmarks/bench_calibration.py).

Invented data, for simulation only. Each simulated voxel is one run of ``N_SCANS`` volumes of a
stationary noise process (statsmodels ``ArmaProcess``), spatially independent, on a grid of
``VOXEL_MM`` voxels; the whole grid is fitted with ``glmsteps.fitting.fit_voxels`` exactly as
the fit step does (percent scaling is skipped: the noise has unit variance around 100).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.stats
from statsmodels.tsa.arima_process import ArmaProcess

from glmsteps import estimation as est
from glmsteps import fitting
from glmsteps.settings import FitSettings

N_SCANS = 300
VOXEL_MM = 3.0
CUTOFF_S = 128.0
#: Noise processes: name -> (AR coefficients, white fraction of the variance).
NOISES: dict[str, tuple[tuple[float, ...], float]] = {
    "white": ((), 1.0),
    "AR(1) 0.3": ((0.3,), 0.0),
    "AR(1) 0.5": ((0.5,), 0.0),
    "AR(2) 0.5, 0.2": ((0.5, 0.2), 0.0),
    "AR(1) 0.8 + white": ((0.8,), 0.5),
}
DESIGNS = ("block", "event")
TRS_S = (2.0, 0.8)


def double_gamma(t_s: np.ndarray) -> np.ndarray:
    """Canonical double-gamma response (peak ~5 s, undershoot ~15 s, ratio 1/6).  # common practice"""
    return scipy.stats.gamma.pdf(t_s, 6) - scipy.stats.gamma.pdf(t_s, 16) / 6


def make_design(kind: str, tr_s: float, n: int = N_SCANS, seed: int = 0,
                spikes: int = 0) -> tuple[np.ndarray, list[str]]:
    """Two conditions A and B, cosine drift (128 s), intercept; ``spikes`` censored volumes.

    ``block``: A 16 s, rest 16 s, B 16 s, rest 16 s, repeated. ``event``: impulses 2-6 s apart
    (uniform), each A or B at random. Convolved on a 0.1 s grid, sampled mid-volume.
    """
    dt = 0.1
    total_s = n * tr_s
    grid_s = np.arange(0.0, total_s + 40.0, dt)
    rng = np.random.default_rng(seed)
    if kind == "block":
        phase = grid_s % 64.0
        stims = [(phase < 16).astype(float), ((phase >= 32) & (phase < 48)).astype(float)]
    else:
        onsets = np.cumsum(rng.uniform(2.0, 6.0, size=int(total_s / 3)))
        onsets = onsets[onsets < total_s - 10]
        label = rng.integers(0, 2, onsets.size)
        stims = []
        for k in range(2):
            s = np.zeros_like(grid_s)
            s[np.round(onsets[label == k] / dt).astype(int)] = 1.0 / dt
            stims.append(s)
    h = double_gamma(np.arange(0.0, 32.0, dt))
    frame_s = (np.arange(n) + 0.5) * tr_s
    cols = [np.interp(frame_s, grid_s, np.convolve(s, h)[:grid_s.size] * dt) for s in stims]
    k = int(np.ceil(2 * n * tr_s / CUTOFF_S - 1e-9)) - 1     # cosine periods longer than the cutoff
    drift = np.cos(np.pi * np.outer(np.arange(n) + 0.5, np.arange(1, k + 1)) / n)
    X = np.column_stack(cols + [drift, np.ones(n)])
    roles = ["interest", "interest"] + ["drift"] * k + ["intercept"]
    if spikes:
        for r in rng.choice(np.arange(5, n - 5), spikes, replace=False):
            col = np.zeros(n)
            col[r] = 1.0
            X = np.column_stack([X, col])
            roles.append("spike")
    return X, roles


def simulate_noise(name: str, n: int, v: int, rng: np.random.Generator) -> np.ndarray:
    """Unit-variance stationary noise of shape (n, v).

    reference: statsmodels ArmaProcess.generate_sample (burn-in 200 scans: 0.8^200 < 1e-19) for the AR
    part; the white part of ``AR(1) 0.8 + white`` is independent N(0, 1) noise, its variance a given
    fraction of the total. Generated voxel by voxel along the contiguous axis, then transposed.
    """
    phi, white = NOISES[name]
    if not phi:
        return rng.standard_normal((n, v))
    proc = ArmaProcess(np.r_[1.0, -np.asarray(phi)], [1.0])
    sd = np.sqrt(proc.acovf(1)[0])                          # AR variance per unit innovation variance
    ar = proc.generate_sample((v, n), scale=1.0 / sd, distrvs=rng.standard_normal, axis=1, burnin=200).T
    if white == 0.0:
        return ar
    return np.sqrt(1.0 - white) * ar + np.sqrt(white) * rng.standard_normal((n, v))


def true_acf(name: str, n_lags: int) -> np.ndarray:
    """Autocorrelations 0..n_lags-1 of a noise (reference: statsmodels ArmaProcess.acf)."""
    phi, white = NOISES[name]
    r = ArmaProcess(np.r_[1.0, -np.asarray(phi)], [1.0]).acf(n_lags) if phi else np.eye(1, n_lags)[0]
    r = (1.0 - white) * r
    r[0] = 1.0
    return r


def noise_settings(model: str, design: est.DesignFactors, fwhm_mm: float | None = None,
                   order: int | None = None) -> fitting.NoiseSettings:
    """The fit step's settings for a model (its defaults: ``glmsteps.settings.FitSettings``, the schema's)."""
    defaults = FitSettings.defaults()
    order = est.check_ar_order(design, order or defaults.ar_order) if model == "arp" else 1
    fwhm = fwhm_mm
    if fwhm is None:
        fwhm = defaults.ar_smoothing_fwhm_mm
    if fwhm is None:
        fwhm = est.default_smoothing_fwhm_mm(np.full(3, VOXEL_MM))   # the fit step's rule
    return fitting.NoiseSettings(autocorrelation=model, order=order, smoothing_fwhm_mm=fwhm, bin_width=defaults.ar_bin_width)


@dataclass(frozen=True)
class CellResult:
    """t statistics of contrasts A and A - B at every voxel of one simulated cell."""

    t: dict[str, np.ndarray]
    dof: int
    fit: fitting.VoxelFit


def fit_cell(Y: np.ndarray, X: np.ndarray, roles: list[str], model: str, grid: tuple[int, int, int],
             fwhm_mm: float | None = None, classes: np.ndarray | None = None, order: int | None = None) -> CellResult:
    """Fit a simulated grid as the fit step does and return the t maps of A and A - B."""
    design = est.prepare_design(X, roles)
    v = Y.shape[1]
    vgrid = fitting.VoxelGrid(shape=grid, flat_index=np.arange(v), voxel_size_mm=np.full(3, VOXEL_MM),
                              classes=classes)
    vf = fitting.fit_voxels(Y, np.arange(v), np.ones(v), design, noise_settings(model, design, fwhm_mm, order), 4096,
                            vgrid)
    p = X.shape[1]
    t = {}
    for name, c in (("A", np.r_[1.0, 0.0, np.zeros(p - 2)]), ("A-B", np.r_[1.0, -1.0, np.zeros(p - 2)])):
        var = vf.residual_variance.astype(np.float64) * np.einsum("i,bij,j->b", c, vf.bin_covariance, c)[vf.bin]
        t[name] = (c @ vf.beta.astype(np.float64)) / np.sqrt(var)
    return CellResult(t=t, dof=design.dof, fit=vf)


def false_positives(t: np.ndarray, dof: int, alpha: float) -> int:
    """Voxels with two-sided p < alpha (reference: scipy.stats.t)."""
    return int(np.sum(2.0 * scipy.stats.t.sf(np.abs(t), dof) < alpha))


def binomial_interval(v: int, alpha: float, level: float = 0.95) -> tuple[float, float]:
    """Central binomial interval of the false-positive count of ``v`` null voxels (reference: scipy.stats.binom)."""
    lo, hi = scipy.stats.binom.interval(level, v, alpha)
    return float(lo), float(hi)


def null_cell(noise: str, design_kind: str, tr_s: float, model: str, grid: tuple[int, int, int], seed: int,
              fwhm_mm: float | None = None, spikes: int = 0) -> CellResult:
    """Simulate and fit one null cell."""
    rng = np.random.default_rng(seed)
    X, roles = make_design(design_kind, tr_s, seed=seed, spikes=spikes)
    v = int(np.prod(grid))
    Y = (100.0 + simulate_noise(noise, X.shape[0], v, rng)).astype(np.float32)
    return fit_cell(Y, X, roles, model, grid, fwhm_mm)
