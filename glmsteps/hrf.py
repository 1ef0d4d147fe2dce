"""Haemodynamic response functions (HRF) and basis sets, sampled on a time grid.

Pure maths: arrays in, arrays out, no file access.

Every continuous kernel is a difference of two gamma densities. A kernel set
for one model is sampled on ``t_s = 0, dt_s, 2 dt_s, ...`` up to (excluding)
``length_s`` and returned as ``kernels (n_t, k)`` together with one label per
column (``main``, ``latency``, ``width``, ``fir00`` ...).

Basis words (our own): ``latency`` is the column that models a shift of the
response in time (the finite-difference derivative with respect to onset),
``width`` the column that models a wider or narrower response (the derivative
with respect to the response dispersion).

Normalisation
-------------
The main kernel of every gamma model is divided by ``sum(h) * dt_s`` (the
Riemann sum of the sampled kernel), so that its integral over the sampled
window is exactly 1: convolving a boxcar of height 1 that lasts longer than
the kernel window gives a plateau of 1 (in the units of the stimulus), and an
impulse of unit area gives a response whose area is 1. The derivative kernels
(latency, width) are finite differences of the *same* normalised function
(one shared constant), so their integral is close to 0. FIR kernels are boxcars of height 1
and are not normalised: a unit-area impulse gives 1 in every volume whose
delay after the onset falls inside that bin (a fraction within one time step
of a bin edge).
"""

from __future__ import annotations

from typing import Literal

import numpy as np
import numpy.typing as npt
from scipy.special import gammaln

from .errors import ConfigError
from .names import FIR_PREFIX, LATENCY_BASIS, WIDTH_BASIS

ResponseModel = Literal["double_gamma", "double_gamma_latency", "double_gamma_latency_width", "glover_1999", "fir"]

#: The accepted ``model`` names of :func:`hrf_basis` (``design.hrf`` in the config).
HRF_MODELS: tuple[str, ...] = ("double_gamma", "double_gamma_latency", "double_gamma_latency_width", "glover_1999",
                               "fir")

#: Default length of the sampled kernel window (seconds).
KERNEL_LENGTH_S: float = 32.0
#: Delay used for the finite-difference latency column (derivative with respect to onset, seconds).
LATENCY_STEP_S: float = 0.1
#: Step of the response dispersion used for the finite-difference width column (seconds).
WIDTH_STEP_S: float = 0.01

#: Canonical double-gamma: mean delay of the response and of the undershoot (s),
#: their dispersions (s) and the response-to-undershoot amplitude ratio.
PEAK_DELAY_S: float = 6.0
UNDERSHOOT_DELAY_S: float = 16.0
PEAK_DISPERSION_S: float = 1.0
UNDERSHOOT_DISPERSION_S: float = 1.0
UNDERSHOOT_RATIO: float = 1.0 / 6.0

#: Glover (1999) motor-response parameters (from memory): exponents n1, n2,
#: time constants t1, t2 (s) and undershoot amplitude a2.
GLOVER_N1: float = 6.0
GLOVER_T1_S: float = 0.9
GLOVER_N2: float = 12.0
GLOVER_T2_S: float = 0.9
GLOVER_A2: float = 0.35


def gamma_density(t_s: npt.ArrayLike, shape: float, scale_s: float) -> npt.NDArray[np.float64]:
    """Gamma probability density evaluated at times ``t_s``; 0 for ``t_s <= 0``.

    Parameters
    ----------
    t_s : array_like, shape (n_t,)
        Times (seconds).
    shape : float
        Shape parameter (dimensionless, > 0).
    scale_s : float
        Scale parameter (seconds, > 0).

    Returns
    -------
    ndarray, shape (n_t,), float64
        Density (1/seconds).

    Notes
    -----
    f(t) = t^(shape-1) exp(-t / scale) / (Gamma(shape) scale^shape), evaluated
    in log space: log f = (shape-1) log t - t/scale - lgamma(shape) - shape log scale.
    """
    t = np.asarray(t_s, dtype=np.float64)
    out = np.zeros_like(t)
    pos = t > 0
    tp = t[pos]
    out[pos] = np.exp((shape - 1.0) * np.log(tp) - tp / scale_s - gammaln(shape) - shape * np.log(scale_s))
    return out


def double_gamma(t_s: npt.ArrayLike, *, peak_delay_s: float = PEAK_DELAY_S,
                 undershoot_delay_s: float = UNDERSHOOT_DELAY_S,
                 peak_dispersion_s: float = PEAK_DISPERSION_S,
                 undershoot_dispersion_s: float = UNDERSHOOT_DISPERSION_S,
                 ratio: float = UNDERSHOOT_RATIO) -> npt.NDArray[np.float64]:
    """Un-normalised double-gamma response at times ``t_s``.

    Parameters
    ----------
    t_s : array_like, shape (n_t,)
        Time after the impulse (seconds).
    peak_delay_s, undershoot_delay_s : float
        Mean delays of the response and the undershoot gamma densities (seconds).
    peak_dispersion_s, undershoot_dispersion_s : float
        Their dispersions (gamma scale, seconds).
    ratio : float
        Undershoot amplitude relative to the response.

    Returns
    -------
    ndarray, shape (n_t,), float64

    Notes
    -----
    h(t) = g(t; d1/s1, s1) - ratio * g(t; d2/s2, s2), with g(t; a, s) the gamma
    density of shape a and scale s (mean a s = d). With unit dispersions the
    shapes equal the delays (6 and 16), the response peaks at (6-1) = 5 s and
    the undershoot is deepest near 15 s. This is the two-gamma form of
    Friston et al. (1998), "Event-related fMRI: characterizing differential
    responses", NeuroImage 7:30-40 (parameter values from memory). Writing the
    shape as delay / dispersion keeps the mean delay fixed when the dispersion
    changes, which is what the width column perturbs.
    """
    return (gamma_density(t_s, peak_delay_s / peak_dispersion_s, peak_dispersion_s)
            - ratio * gamma_density(t_s, undershoot_delay_s / undershoot_dispersion_s, undershoot_dispersion_s))


def glover_response(t_s: npt.ArrayLike, *, n1: float = GLOVER_N1, t1_s: float = GLOVER_T1_S,
                    n2: float = GLOVER_N2, t2_s: float = GLOVER_T2_S,
                    a2: float = GLOVER_A2) -> npt.NDArray[np.float64]:
    """Un-normalised Glover (1999) response at times ``t_s``.

    Parameters
    ----------
    t_s : array_like, shape (n_t,)
        Time after the impulse (seconds).
    n1, n2 : float
        Exponents of the response and undershoot terms.
    t1_s, t2_s : float
        Their time constants (seconds).
    a2 : float
        Undershoot amplitude relative to the (peak-normalised) response.

    Returns
    -------
    ndarray, shape (n_t,), float64

    Notes
    -----
    h(t) = (t/d1)^n1 exp(-(t-d1)/t1) - a2 (t/d2)^n2 exp(-(t-d2)/t2), with
    d_i = n_i t_i the time at which each term peaks at value 1: Glover (1999),
    "Deconvolution of impulse response in event-related BOLD fMRI",
    NeuroImage 9:416-429, eq. 3, with his motor-response values n1=6,
    t1=0.9 s, n2=12, t2=0.9 s, a2=0.35 (from memory). Each term is a gamma
    density of shape n_i + 1 and scale t_i divided by its value at d_i.
    """
    out = np.zeros_like(np.asarray(t_s, dtype=np.float64))
    for n, tau, amp in ((n1, t1_s, 1.0), (n2, t2_s, -a2)):
        peak = n * tau
        out += amp * gamma_density(t_s, n + 1.0, tau) / gamma_density(np.array([peak]), n + 1.0, tau)[0]
    return out


def kernel_time_grid(dt_s: float, length_s: float = KERNEL_LENGTH_S) -> npt.NDArray[np.float64]:
    """Sample times ``0, dt_s, ..., < length_s`` (seconds) of a kernel.

    Parameters
    ----------
    dt_s : float
        Step (seconds, > 0).
    length_s : float
        Window length (seconds, > dt_s).

    Returns
    -------
    ndarray, shape (n_t,), float64
        n_t = ceil(length_s / dt_s) (rounded to absorb float error).
    """
    if not (np.isfinite(dt_s) and dt_s > 0):
        raise ConfigError(f"HRF time step dt_s={dt_s!r} must be a positive number of seconds; "
                          "set design.time_resolution_s to e.g. 0.1")
    if not (np.isfinite(length_s) and length_s > dt_s):
        raise ConfigError(f"HRF window length_s={length_s!r} must exceed the time step {dt_s} s; use e.g. 32")
    n_t = int(np.ceil(length_s / dt_s - 1e-9))
    return np.arange(n_t, dtype=np.float64) * dt_s


def fir_kernels(dt_s: float, n_bins: int, bin_width_s: float) -> npt.NDArray[np.float64]:
    """Finite-impulse-response basis: boxcars of height 1 tiling the response window.

    Parameters
    ----------
    dt_s : float
        Sampling step (seconds).
    n_bins : int
        Number of bins (>= 1).
    bin_width_s : float
        Width of each bin (seconds, >= dt_s).

    Returns
    -------
    ndarray, shape (n_t, n_bins), float64
        n_t = ceil(n_bins * bin_width_s / dt_s); column k is 1 on samples with
        k * bin_width_s <= t < (k + 1) * bin_width_s and 0 elsewhere.

    Notes
    -----
    The FIR model fits one free amplitude per post-stimulus delay bin (common
    practice; e.g. Glover 1999 deconvolution). Bin membership is computed from
    the sample index so that bins do not overlap.
    """
    if int(n_bins) != n_bins or n_bins < 1:
        raise ConfigError(f"fir_bins={n_bins!r} must be a whole number >= 1; set design.fir_bins")
    if not (np.isfinite(bin_width_s) and bin_width_s >= dt_s):
        raise ConfigError(f"fir_bin_width_s={bin_width_s!r} must be at least the time step {dt_s} s; "
                          "set design.fir_bin_width_s")
    t = kernel_time_grid(dt_s, n_bins * bin_width_s)
    which = np.floor(t / bin_width_s + 1e-9).astype(np.int64)
    out = np.zeros((t.size, int(n_bins)), dtype=np.float64)
    inside = which < n_bins
    out[np.nonzero(inside)[0], which[inside]] = 1.0
    return out


def hrf_basis(model: ResponseModel, dt_s: float, *, fir_bins: int = 0, fir_bin_width_s: float = 0.0,
              length_s: float = KERNEL_LENGTH_S) -> tuple[npt.NDArray[np.float64], list[str]]:
    """Sampled kernels of a response model.

    Parameters
    ----------
    model : {"double_gamma", "double_gamma_latency", "double_gamma_latency_width", "glover_1999", "fir"}
        ``double_gamma``: canonical kernel only. ``double_gamma_latency``:
        plus a latency column (temporal derivative). ``double_gamma_latency_width``:
        plus the latency and width columns (temporal and dispersion
        derivatives). ``glover_1999``: the Glover (1999) kernel. ``fir``:
        ``fir_bins`` boxcars of ``fir_bin_width_s``.
    dt_s : float
        Sampling step (seconds).
    fir_bins : int
        Number of FIR bins (``fir`` only).
    fir_bin_width_s : float
        FIR bin width (seconds; ``fir`` only).
    length_s : float
        Window of the gamma kernels (seconds; 32 by default).

    Returns
    -------
    kernels : ndarray, shape (n_t, k), float64
        Kernel k sampled at ``t = i * dt_s``.
    labels : list of str, length k
        ``main``, ``latency``, ``width`` or ``fir00``, ``fir01``, ...

    Notes
    -----
    Normalisation: ``h_n = h / (sum(h) dt)`` for the main kernel (unit
    integral, see the module docstring).

    Latency column (temporal derivative, with respect to onset):
    ``(h_n(t - delta) - h_n(t)) / delta`` with ``delta`` =
    ``LATENCY_STEP_S`` = 0.1 s, i.e. minus the time derivative; a positive
    weight models a later response (first-order Taylor expansion of a shifted
    response, Friston et al. 1998).

    Width column (dispersion derivative): ``(h_n(t; s1) - h_n(t; s1 + eps)) / eps``
    with the response dispersion s1 = 1 s and ``eps`` = ``WIDTH_STEP_S`` =
    0.01 s, at fixed mean delay, scaled by the main kernel's constant.

    The latency and width kernels are not orthogonalised against the main kernel.
    """
    if model not in HRF_MODELS:
        raise ConfigError(f"unknown response model {model!r}; set design.hrf to one of {', '.join(HRF_MODELS)}")
    if model == "fir":
        kernels = fir_kernels(dt_s, fir_bins, fir_bin_width_s)
        return kernels, [f"{FIR_PREFIX}{k:02d}" for k in range(kernels.shape[1])]
    t = kernel_time_grid(dt_s, length_s)
    if model == "glover_1999":
        h = glover_response(t)
        return (h / (h.sum() * dt_s))[:, None], ["main"]
    h = double_gamma(t)
    scale = 1.0 / (h.sum() * dt_s)
    columns = [h * scale]
    labels = ["main"]
    if model in ("double_gamma_latency", "double_gamma_latency_width"):
        shifted = double_gamma(t - LATENCY_STEP_S)
        columns.append((shifted - h) * scale / LATENCY_STEP_S)
        labels.append(LATENCY_BASIS)
    if model == "double_gamma_latency_width":
        wider = double_gamma(t, peak_dispersion_s=PEAK_DISPERSION_S + WIDTH_STEP_S)
        columns.append((h - wider) * scale / WIDTH_STEP_S)
        labels.append(WIDTH_BASIS)
    return np.column_stack(columns), labels
