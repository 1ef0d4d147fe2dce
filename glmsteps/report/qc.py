"""QC numbers of the study report (pure: arrays and tables in, arrays and tables out).

Temporal SNR
    For a fitted voxel, ``tSNR = m / s``: ``m`` is the temporal mean of the raw
    (unscaled) signal over the kept volumes, ``s`` the standard deviation of
    the noise left after the model, in the same raw units. The fit stores the
    residual variance ``sigma2`` in *scaled* units (scaled signal = raw x
    factor; the factor is ``100 / m`` for percent scaling, one factor for the
    whole run for grand-mean scaling, 1 without scaling) and, for a
    prewhitened fit, ``sigma2`` is the variance of the whitened residuals,
    i.e. of the innovations of the autocorrelation model. The marginal noise variance is
    ``sigma2 / g`` with ``g = var(innovation) / var(noise)``: 1 for OLS,
    ``1 - rho^2`` for AR(1) (``rho`` the lag-1 coefficient the voxel was
    whitened with, its bin's), ``prod_k (1 - kappa_k^2)`` for AR(p) with
    ``kappa_k`` the reflection (partial autocorrelation) coefficients of the
    voxel's AR coefficients (Brockwell & Davis (1991) *Time Series: Theory and
    Methods*, sec. 5.2, Levinson-Durbin). So ``s = sqrt(sigma2 / g) / factor``
    and, for percent scaling, ``tSNR = 100 sqrt(g / sigma2)``. A run's tSNR is
    the median over its fitted voxels.

The outlier rule
    A run's value of a QC measure is an outlier when it lies more than ``k``
    robust standard deviations from the median of the runs of its site, on
    the side where the measure is bad (high censored fraction and motion, low
    temporal SNR and design efficiency, either side for the mean signal and
    the AR coefficient). The robust standard deviation is the scaled MAD
    (1.4826 x the median absolute deviation from the median, a consistent
    estimate of the standard deviation for normal data; Rousseeuw & Croux
    (1993), JASA 88:1273; Leys et al. (2013), J. Exp. Soc. Psychol. 49:764
    recommend k = 2.5 to 3), but at least ``min_relative_spread`` x
    ``|median|``, so that runs which differ by a few percent from very
    similar runs are not flagged. A site with fewer than ``min_site_runs``
    runs with a value is compared with the whole study instead. Where the MAD
    is 0 (more than half the runs share one value), the scale is 1.2533 x
    the mean absolute deviation from the median (consistent for normal data
    as well); where that and the floor are 0 too, every value equals the
    median and nothing is flagged.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import numpy.typing as npt

from ..estimation import AutocorrelationModel

FloatArray = npt.NDArray[np.float64]
Direction = Literal["high", "low", "both"]
Scaling = Literal["percent", "grand_mean", "none"]

#: 1 / Phi^{-1}(3/4): the scaled MAD estimates the SD of normal data (Rousseeuw & Croux 1993).
MAD_TO_SD = 1.482602218505602
#: sqrt(pi / 2): the mean absolute deviation times this estimates the SD of normal data.
MEANAD_TO_SD = 1.2533141373155001
#: Quantiles (percent) of the AR coefficient distribution shown per run.
AR_QUANTILES_PERCENT: tuple[float, ...] = (5.0, 25.0, 50.0, 75.0, 95.0)


# ----------------------------------------------------------------------------
# temporal SNR
# ----------------------------------------------------------------------------

def scale_factors(mean_signal: npt.ArrayLike, scaling: Scaling, grand_mean_value: float = 100.0) -> FloatArray:
    """The factor the fit multiplied each voxel's raw signal by.

    Parameters
    ----------
    mean_signal : array_like, shape (v,)
        Temporal mean of each fitted voxel's raw signal (image units).
    scaling : {"percent", "grand_mean", "none"}
    grand_mean_value : float
        Target of grand-mean scaling.

    Returns
    -------
    ndarray, shape (v,), float64

    Notes
    -----
    The fit's own rule, ``glmsteps.estimation.compute_scale_factors`` (percent:
    ``100 / m``; grand mean: ``grand_mean_value / mean(m)`` over the fitted
    voxels; none: 1).
    """
    from ..estimation import compute_scale_factors

    if scaling not in ("percent", "grand_mean", "none"):
        raise ValueError(f"unknown scaling {scaling!r}; expected percent, grand_mean or none")
    return np.asarray(compute_scale_factors(mean_signal, scaling, grand_mean_value), dtype=np.float64)


def reflection_coefficients(phi: npt.ArrayLike) -> FloatArray:
    """Reflection (partial autocorrelation) coefficients of AR coefficients, voxel by voxel.

    Parameters
    ----------
    phi : array_like, shape (v, q)
        AR coefficients (``y_t = sum_k phi_k y_{t-k} + u_t``) of v processes.

    Returns
    -------
    ndarray, shape (v, q)
        ``kappa_1..kappa_q``; a stationary process has all ``|kappa| < 1``.

    Notes
    -----
    The step-down (inverse Levinson-Durbin) recursion: ``kappa_m = phi_{m,m}``,
    ``phi_{m-1,j} = (phi_{m,j} + kappa_m phi_{m,m-j}) / (1 - kappa_m^2)``
    (Brockwell & Davis 1991, sec. 5.2).
    """
    a = np.atleast_2d(np.asarray(phi, dtype=np.float64)).copy()
    v, q = a.shape
    kappa = np.zeros((v, q))
    for m in range(q, 0, -1):
        k = a[:, m - 1].copy()
        kappa[:, m - 1] = k
        if m > 1:
            denom = 1.0 - k * k
            prev = np.empty((v, m - 1))
            for j in range(1, m):
                prev[:, j - 1] = (a[:, j - 1] + k * a[:, m - j - 1]) / denom
            a = prev
    return kappa


def innovation_ratio(model: AutocorrelationModel, ar_coef: npt.ArrayLike | None = None,
                     bin_rho: npt.ArrayLike | None = None, bin_index: npt.ArrayLike | None = None) -> FloatArray:
    """``g = var(innovation) / var(noise)`` of each voxel's autocorrelation model.

    Parameters
    ----------
    model : {"ols", "ar1", "arp"}
    ar_coef : array_like, shape (v, q)
        The fit's per-voxel AR coefficients (``arp``; for ``ols`` only its length is used).
    bin_rho : array_like, shape (b,)
        Lag-1 coefficient of each AR bin (``ar1``: the value the voxel was whitened with).
    bin_index : array_like of int, shape (v,)
        Each voxel's bin (``ar1``).

    Returns
    -------
    ndarray, shape (v,), float64, in (0, 1]

    Notes
    -----
    OLS: 1. AR(1): ``1 - rho^2``. AR(p): ``prod_k (1 - kappa_k^2)`` with the
    reflection coefficients of :func:`reflection_coefficients`, equal to
    ``1 - sum_k phi_k r_k`` (``r`` the autocorrelations; Brockwell & Davis
    1991, sec. 3.3 and 5.2).
    """
    if model == "ols":
        n = 0 if ar_coef is None else np.atleast_2d(np.asarray(ar_coef)).shape[0]
        if bin_index is not None:
            n = np.asarray(bin_index).size
        return np.ones(n)
    if model == "ar1":
        if bin_rho is None or bin_index is None:
            raise ValueError("ar1: bin_rho and bin_index are required")
        rho = np.asarray(bin_rho, dtype=np.float64)[np.asarray(bin_index, dtype=np.int64)]
        return 1.0 - rho * rho
    if model == "arp":
        if ar_coef is None:
            raise ValueError("arp: ar_coef is required")
        kappa = reflection_coefficients(ar_coef)
        return np.prod(1.0 - kappa * kappa, axis=1)
    raise ValueError(f"unknown autocorrelation model {model!r}; expected ols, ar1 or arp")


def temporal_snr(mean_signal: npt.ArrayLike, residual_variance: npt.ArrayLike, factors: npt.ArrayLike,
                 ratio: npt.ArrayLike | float = 1.0) -> FloatArray:
    """Voxelwise temporal SNR: raw temporal mean / raw SD of the model's noise.

    Parameters
    ----------
    mean_signal : array_like, shape (v,)
        Temporal mean of the raw signal (image units).
    residual_variance : array_like, shape (v,)
        The fit's residual variance in scaled units (whitened residuals for a
        prewhitened fit).
    factors : array_like, shape (v,)
        Scale factors the fit applied (:func:`scale_factors`).
    ratio : array_like, shape (v,), or float
        :func:`innovation_ratio` (1 for OLS).

    Returns
    -------
    ndarray, shape (v,), float64
        NaN where the residual variance is not positive.

    Notes
    -----
    ``tSNR = m / (sqrt(sigma2 / g) / factor)`` (see the module docstring).
    """
    m = np.asarray(mean_signal, dtype=np.float64)
    s2 = np.asarray(residual_variance, dtype=np.float64) / np.asarray(ratio, dtype=np.float64)
    f = np.asarray(factors, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        sd_raw = np.sqrt(s2) / np.abs(f)
        out = m / sd_raw
    return np.where(s2 > 0, out, np.nan)


@dataclass(frozen=True)
class RunSignalQc:
    """Signal QC of one fitted run.

    Attributes
    ----------
    n_voxels : int
        Fitted voxels.
    mean_signal : float
        Mean over the fitted voxels of the raw temporal mean (image units).
    tsnr_median : float
        Median voxelwise temporal SNR.
    ar_quantiles : tuple of float
        Lag-1 AR coefficient at :data:`AR_QUANTILES_PERCENT` over the fitted voxels.
    """

    n_voxels: int
    mean_signal: float
    tsnr_median: float
    ar_quantiles: tuple[float, ...]


def summarise_run_signal(mean_signal: npt.ArrayLike, tsnr: npt.ArrayLike, lag1: npt.ArrayLike) -> RunSignalQc:
    """Run-level summaries of the voxelwise signal QC.

    Parameters
    ----------
    mean_signal, tsnr, lag1 : array_like, shape (v,)
        Raw temporal mean, temporal SNR and lag-1 AR coefficient of the fitted voxels.

    Returns
    -------
    RunSignalQc
        NaN summaries for a run without fitted voxels.
    """
    m = np.asarray(mean_signal, dtype=np.float64)
    t = np.asarray(tsnr, dtype=np.float64)
    a = np.asarray(lag1, dtype=np.float64)
    t, a = t[np.isfinite(t)], a[np.isfinite(a)]
    quantiles = tuple(float(x) for x in np.percentile(a, AR_QUANTILES_PERCENT)) if a.size else \
        tuple(float("nan") for _ in AR_QUANTILES_PERCENT)
    return RunSignalQc(n_voxels=int(m.size), mean_signal=float(m.mean()) if m.size else float("nan"),
                       tsnr_median=float(np.median(t)) if t.size else float("nan"), ar_quantiles=quantiles)


def motion_summary(displacement: npt.ArrayLike) -> dict[str, float]:
    """Mean and largest value of a per-volume motion measure (NaN entries ignored).

    Parameters
    ----------
    displacement : array_like, shape (n_volumes,)
        E.g. framewise displacement in mm.

    Returns
    -------
    dict with ``mean`` and ``max`` (NaN when no value is finite).
    """
    d = np.asarray(displacement, dtype=np.float64)
    d = d[np.isfinite(d)]
    if not d.size:
        return {"mean": float("nan"), "max": float("nan")}
    return {"mean": float(d.mean()), "max": float(d.max())}


# ----------------------------------------------------------------------------
# the outlier rule
# ----------------------------------------------------------------------------

def robust_scale(values: npt.ArrayLike) -> tuple[float, float]:
    """Median and robust SD of the finite values (see the module docstring).

    Returns
    -------
    (median, scale)
        ``scale`` is 1.4826 x MAD, or 1.2533 x mean absolute deviation from
        the median when the MAD is 0; ``(nan, nan)`` without finite values.
    """
    x = np.asarray(values, dtype=np.float64)
    x = x[np.isfinite(x)]
    if not x.size:
        return float("nan"), float("nan")
    med = float(np.median(x))
    dev = np.abs(x - med)
    scale = MAD_TO_SD * float(np.median(dev))
    if scale == 0.0:
        scale = MEANAD_TO_SD * float(dev.mean())
    return med, scale


def robust_z(values: npt.ArrayLike, groups: Sequence[str], min_group_size: int = 5,
             min_relative_spread: float = 0.0) -> FloatArray:
    """Each value's distance from its group's median in robust SDs.

    Parameters
    ----------
    values : array_like, shape (n,)
        One QC measure per run (NaN = not available).
    groups : sequence of str, length n
        Each run's site.
    min_group_size : int
        A group with fewer finite values is compared with all finite values instead.
    min_relative_spread : float
        The robust SD is at least this fraction of ``|median|``.

    Returns
    -------
    ndarray, shape (n,), float64
        ``(x - median) / scale``; 0 where the scale is 0 (all reference values
        equal the median); NaN where the value is NaN.
    """
    x = np.asarray(values, dtype=np.float64)
    g = np.asarray([str(s) for s in groups], dtype=object)
    if g.shape != x.shape:
        raise ValueError(f"values ({x.shape}) and groups ({g.shape}) differ in length")
    out = np.full(x.shape, np.nan)
    study = robust_scale(x)
    for site in dict.fromkeys(g.tolist()):
        members = g == site
        n_finite = int(np.isfinite(x[members]).sum())
        med, scale = robust_scale(x[members]) if n_finite >= min_group_size else study
        if np.isfinite(med):
            scale = max(scale, min_relative_spread * abs(med))
        with np.errstate(divide="ignore", invalid="ignore"):
            z = (x[members] - med) / scale if scale > 0 else np.where(np.isfinite(x[members]), 0.0, np.nan)
        out[members] = z
    return out


def flag_outliers(values: npt.ArrayLike, groups: Sequence[str], k: float = 3.0, min_group_size: int = 5,
                  direction: Direction = "both", min_relative_spread: float = 0.0) -> npt.NDArray[np.bool_]:
    """True where a value lies more than ``k`` robust SDs from its site's median on the bad side.

    Parameters
    ----------
    values, groups, min_group_size, min_relative_spread
        As for :func:`robust_z`.
    k : float
        Threshold in robust SDs.
    direction : {"high", "low", "both"}
        Which side is bad (``high``: only values above the median are flagged).

    Returns
    -------
    ndarray of bool, shape (n,)
        NaN values are never flagged.
    """
    z = robust_z(values, groups, min_group_size, min_relative_spread)
    if direction == "high":
        return np.isfinite(z) & (z > k)
    if direction == "low":
        return np.isfinite(z) & (z < -k)
    if direction == "both":
        return np.isfinite(z) & (np.abs(z) > k)
    raise ValueError(f"direction must be high, low or both, found {direction!r}")


def describe_outlier_rule(k: float, min_group_size: int, min_relative_spread: float = 0.0) -> str:
    """The outlier rule in one sentence, as the report states it."""
    floor = (f", but at least {min_relative_spread:.0%} of the median (runs that differ by a few percent are not "
             "outliers)") if min_relative_spread > 0 else ""
    return (f"A value is flagged when it lies more than {k:g} robust standard deviations from the median of the "
            "runs of its site, on the side where the measure is bad (high censored fraction and motion, low "
            "temporal SNR and design efficiency, either side for the mean signal and the AR coefficient). The "
            f"robust standard deviation is the scaled MAD (1.4826 x median absolute deviation){floor}; a site with "
            f"fewer than {min_group_size} runs with a value is compared with the whole study; where the MAD is 0 "
            "the scale is 1.2533 x the mean absolute deviation from the median.")
