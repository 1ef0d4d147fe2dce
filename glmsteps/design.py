"""Frame times, event convolution, drift bases, design assembly and diagnostics.

Pure maths: tables and arrays in, arrays out, no file access.

Column conventions (see DEVELOPERS.md): a condition's main regressor carries
the condition's name; other basis columns are ``<condition>__latency`` (a
shift of the response in time), ``<condition>__width`` (a wider or narrower
response) and ``<condition>__fir<k>``; parametric modulators
``<condition>__x_<column>``; the slow-signal (drift) basis ``slow_<k>`` with
k written as two digits from 01 (k is the cosine frequency index or the
polynomial degree); confounds keep their names
(``spike_*`` columns get the role ``spike``); one ``intercept``. Column order:
conditions (each with its basis columns then its modulators), confounds in
table order, drifts, intercept.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy.signal import fftconvolve

from .errors import DesignError, GlmstepsWarning
from .hrf import HRF_MODELS, ResponseModel, hrf_basis
from .names import BASIS_SEPARATOR, INTERCEPT, MODULATOR_INFIX, SLOW_PREFIX, SPIKE_PREFIX

DriftModel = Literal["cosine", "legendre", "none"]
DRIFT_MODELS: tuple[str, ...] = ("cosine", "legendre", "none")
#: Largest allowed step of the oversampled stimulus grid (seconds).
MAX_DT_S: float = 0.1
ROLES: tuple[str, ...] = ("interest", "modulator", "drift", "confound", "spike", "intercept")



@dataclass(frozen=True)
class Design:
    """A design matrix with its column metadata.

    Attributes
    ----------
    X : ndarray, shape (n_scans, n_regressors), float64
        The design matrix.
    names : tuple of str, length n_regressors
        Column names (DEVELOPERS.md conventions).
    roles : tuple of str
        ``interest``, ``modulator``, ``drift``, ``confound``, ``spike`` or ``intercept``.
    conditions : tuple of str
        Condition of each column, ``""`` for nuisance columns.
    basis : tuple of str
        ``main``, ``latency``, ``width``, ``fir<k>``, ``modulator`` or ``""``.
    frame_times_s : ndarray, shape (n_scans,), float64
        Acquisition time of each row (seconds, absolute from the first acquired volume).
    """

    X: npt.NDArray[np.float64]
    names: tuple[str, ...]
    roles: tuple[str, ...]
    conditions: tuple[str, ...]
    basis: tuple[str, ...]
    frame_times_s: npt.NDArray[np.float64]

    def to_frame(self) -> pd.DataFrame:
        """The design as a table, one column per regressor (rows = scans)."""
        return pd.DataFrame(self.X, columns=list(self.names))


# --------------------------------------------------------------------------- timing


def frame_times(n_volumes: int, repetition_time_s: float, volume_time_fraction: float = 0.5,
                first_volume: int = 0) -> npt.NDArray[np.float64]:
    """Acquisition times of volumes ``first_volume .. first_volume + n_volumes - 1``.

    Parameters
    ----------
    n_volumes : int
        Number of volumes (>= 1).
    repetition_time_s : float
        TR (seconds, > 0).
    volume_time_fraction : float
        Reference point within each TR, 0 (start of the volume) to 1 (end).
    first_volume : int
        Index of the first volume (0-based; >= 0).

    Returns
    -------
    ndarray, shape (n_volumes,), float64
        Seconds since the start of volume 0.

    Notes
    -----
    t_j = (first_volume + j + volume_time_fraction) * TR (common practice: events
    onsets are measured from the start of the first acquired volume).
    """
    if int(n_volumes) != n_volumes or n_volumes < 1:
        raise DesignError(f"n_volumes={n_volumes!r} must be a whole number >= 1; check the BOLD volume count")
    if not (np.isfinite(repetition_time_s) and repetition_time_s > 0):
        raise DesignError(f"repetition_time_s={repetition_time_s!r} must be a positive number of seconds; "
                          "give the run's TR in its BIDS sidecar (RepetitionTime) or set acquisition.repetition_time_s")
    if not (np.isfinite(volume_time_fraction) and 0.0 <= volume_time_fraction <= 1.0):
        raise DesignError(f"volume_time_fraction={volume_time_fraction!r} must be between 0 and 1 (fraction of the TR); "
                          "set acquisition.volume_time_fraction to 0.5 for the middle of the volume")
    if int(first_volume) != first_volume or first_volume < 0:
        raise DesignError(f"first_volume={first_volume!r} must be a whole number >= 0")
    return (int(first_volume) + np.arange(int(n_volumes), dtype=np.float64) + float(volume_time_fraction)) * float(
        repetition_time_s)


def _check_dt(dt_s: float) -> float:
    if not (np.isfinite(dt_s) and 0 < dt_s <= MAX_DT_S):
        raise DesignError(f"time resolution dt_s={dt_s!r} s must be > 0 and <= {MAX_DT_S} s; "
                          "set design.time_resolution_s to 0.1 or finer")
    return float(dt_s)


def convolve_events(onsets_s: npt.ArrayLike, durations_s: npt.ArrayLike, amplitudes: npt.ArrayLike,
                    frame_times_s: npt.ArrayLike, kernel: npt.ArrayLike,
                    dt_s: float = 0.1) -> npt.NDArray[np.float64]:
    """Convolve events with HRF kernels and sample at frame times.

    Parameters
    ----------
    onsets_s : array_like, shape (n_events,)
        Event onsets (seconds, same clock as ``frame_times_s``).
    durations_s : array_like, shape (n_events,)
        Durations (seconds, >= 0); 0 means an impulse.
    amplitudes : array_like, shape (n_events,)
        Height of each event's boxcar (or area of its impulse).
    frame_times_s : array_like, shape (n_scans,)
        Times at which to sample the regressor (seconds).
    kernel : array_like, shape (n_t,) or (n_t, k)
        Kernel(s) sampled at step ``dt_s`` from t = 0 (see :func:`glmsteps.hrf.hrf_basis`).
    dt_s : float
        Step of the oversampled stimulus grid (seconds, 0 < dt_s <= 0.1).

    Returns
    -------
    ndarray, shape (n_scans,) or (n_scans, k), float64

    Notes
    -----
    The stimulus s(t) is built on the grid t_i = t_0 + i dt: a block of
    height a covering [onset, onset + duration) adds to each sample a times the
    fraction of the cell [t_i - dt/2, t_i + dt/2) it covers; an impulse of
    area a adds a/dt split linearly between the two neighbouring samples, so
    that its area and centre are exact. Then r(t_m) = sum_i s_i h(t_m - t_i) dt
    (discrete convolution), and the regressor is r linearly interpolated at
    the frame times. Both constructions are second-order accurate in dt, so
    the result changes by O(dt^2) when the grid is refined. The linear
    convolution model of the BOLD response is that of Boynton, Engel, Glover &
    Heeger (1996), "Linear systems analysis of functional magnetic resonance
    imaging in human V1", J. Neurosci. 16:4207-4221 (from memory);
    oversampling the stimulus before sampling at the frame times is common
    practice.
    """
    dt = _check_dt(dt_s)
    onsets = np.atleast_1d(np.asarray(onsets_s, dtype=np.float64))
    durations = np.atleast_1d(np.asarray(durations_s, dtype=np.float64))
    amps = np.atleast_1d(np.asarray(amplitudes, dtype=np.float64))
    ft = np.atleast_1d(np.asarray(frame_times_s, dtype=np.float64))
    k_arr = np.asarray(kernel, dtype=np.float64)
    squeeze = k_arr.ndim == 1
    k2 = k_arr[:, None] if squeeze else k_arr
    if not (onsets.shape == durations.shape == amps.shape):
        raise DesignError(f"onsets ({onsets.size}), durations ({durations.size}) and amplitudes ({amps.size}) "
                          "must have the same length")
    for label, arr in (("onset", onsets), ("duration", durations), ("amplitude", amps)):
        bad = np.nonzero(~np.isfinite(arr))[0]
        if bad.size:
            raise DesignError(f"event {bad[0]}: {label} is not a finite number; fix the events table")
    if np.any(durations < 0):
        raise DesignError(f"event {np.nonzero(durations < 0)[0][0]}: duration is negative; durations must be >= 0 s")
    t0 = np.floor(min(0.0, ft.min(), onsets.min() if onsets.size else 0.0) / dt) * dt - dt
    n_grid = int(np.ceil((ft.max() - t0) / dt)) + 2
    stim = np.zeros(n_grid, dtype=np.float64)
    cell_lo = t0 + (np.arange(n_grid) - 0.5) * dt
    for onset, dur, amp in zip(onsets, durations, amps):
        if amp == 0.0:
            continue
        pos = (onset - t0) / dt
        if dur == 0.0:
            i = int(np.floor(pos))
            frac = pos - i
            if 0 <= i < n_grid:
                stim[i] += amp * (1.0 - frac) / dt
            if 0 <= i + 1 < n_grid:
                stim[i + 1] += amp * frac / dt
            continue
        end = onset + dur
        i_lo = max(int(np.floor((onset - t0) / dt + 0.5)), 0)
        i_hi = min(int(np.floor((end - t0) / dt + 0.5)), n_grid - 1)
        if i_lo > n_grid - 1:
            continue
        idx = np.arange(i_lo, i_hi + 1)
        lo = cell_lo[idx]
        cover = np.clip(np.minimum(lo + dt, end) - np.maximum(lo, onset), 0.0, None) / dt
        stim[idx] += amp * cover
    grid_t = t0 + np.arange(n_grid) * dt
    out = np.empty((ft.size, k2.shape[1]), dtype=np.float64)
    for j in range(k2.shape[1]):
        response = fftconvolve(stim, k2[:, j])[:n_grid] * dt
        # FFT round-off leaves ~1e-17 where the exact result is 0; clear it so that silent stretches
        # (and regressors of events outside the scan) stay exactly zero.
        noise = 1e-12 * np.abs(stim).sum() * dt * np.abs(k2[:, j]).max()
        response[np.abs(response) <= noise] = 0.0
        out[:, j] = np.interp(ft, grid_t, response)
    return out[:, 0] if squeeze else out


# --------------------------------------------------------------------------- drifts


def _check_frames(frame_times_s: npt.ArrayLike) -> npt.NDArray[np.float64]:
    ft = np.asarray(frame_times_s, dtype=np.float64)
    if ft.ndim != 1 or ft.size < 2:
        raise DesignError(f"frame times must be a 1-D array of at least 2 volumes, found shape {ft.shape}")
    step = np.diff(ft)
    if not (np.all(np.isfinite(ft)) and np.all(step > 0) and np.allclose(step, step[0], rtol=1e-6, atol=0)):
        raise DesignError("frame times must be finite and evenly spaced (one TR apart); check the run's repetition time")
    return ft


def cosine_drift_count(n_scans: int, repetition_time_s: float, cutoff_s: float) -> int:
    """Number of cosine drift columns for ``n_scans`` volumes and a cutoff period.

    Returns
    -------
    int
        K = ceil(2 n TR / cutoff) - 1, capped at n - 1: the number of integers
        k >= 1 with frequency k / (2 n TR) strictly below 1 / cutoff_s.
    """
    x = 2.0 * n_scans * repetition_time_s / cutoff_s
    return int(min(max(int(np.ceil(x - 1e-9)) - 1, 0), n_scans - 1))


def cosine_drift(frame_times_s: npt.ArrayLike, cutoff_s: float = 128.0) -> npt.NDArray[np.float64]:
    """Discrete cosine drift basis of periods longer than ``cutoff_s``.

    Parameters
    ----------
    frame_times_s : array_like, shape (n_scans,)
        Evenly spaced frame times (seconds).
    cutoff_s : float
        Shortest period kept (seconds, > 0).

    Returns
    -------
    ndarray, shape (n_scans, K), float64
        Unit-norm columns; K = ceil(2 n TR / cutoff_s) - 1 (capped at n - 1),
        the constant (k = 0) excluded.

    Notes
    -----
    DCT-II basis: column k (k = 1..K) is sqrt(2/n) cos(pi k (2 j + 1) / (2 n)),
    j = 0..n-1, of frequency k / (2 n TR) (Ahmed, Natarajan & Rao 1974,
    "Discrete cosine transform", IEEE Trans. Comput. C-23:90-93). Kept are
    the k with k / (2 n TR) < 1 / cutoff_s, i.e. period 2 n TR / k > cutoff_s.
    """
    ft = _check_frames(frame_times_s)
    if not (np.isfinite(cutoff_s) and cutoff_s > 0):
        raise DesignError(f"cutoff_s={cutoff_s!r} must be a positive number of seconds; set design.drift.cutoff_s to e.g. 128")
    n = ft.size
    tr = float(ft[1] - ft[0])
    k = np.arange(1, cosine_drift_count(n, tr, cutoff_s) + 1, dtype=np.float64)
    j = np.arange(n, dtype=np.float64)
    return np.sqrt(2.0 / n) * np.cos(np.pi * np.outer(2.0 * j + 1.0, k) / (2.0 * n))


def legendre_drift(frame_times_s: npt.ArrayLike, order: int) -> npt.NDArray[np.float64]:
    """Polynomial drifts of degree 1..order, orthonormal on the frame grid.

    Parameters
    ----------
    frame_times_s : array_like, shape (n_scans,)
        Frame times (seconds).
    order : int
        Highest degree (>= 1, < n_scans).

    Returns
    -------
    ndarray, shape (n_scans, order), float64
        Column d spans the Legendre polynomial P_d (time mapped to [-1, 1])
        made orthogonal to the constant and to lower degrees on this grid;
        unit norm; sign chosen so that the column correlates positively with P_d.

    Notes
    -----
    Legendre polynomials are orthogonal on [-1, 1] for the continuous inner
    product only; on a finite grid they are re-orthogonalised by a QR
    decomposition of [1, P_1, ..., P_order] (Gram-Schmidt in degree order),
    which keeps span{1, P_1..P_d} for every d (Golub & Van Loan, Matrix
    Computations, sec. 5.2).
    """
    ft = _check_frames(frame_times_s)
    if int(order) != order or order < 1 or order >= ft.size:
        raise DesignError(f"legendre_order={order!r} must be a whole number from 1 to n_volumes - 1 "
                          f"({ft.size - 1}); set design.drift.legendre_order")
    x = 2.0 * (ft - ft[0]) / (ft[-1] - ft[0]) - 1.0
    vander = np.polynomial.legendre.legvander(x, int(order))
    q, r = np.linalg.qr(vander)
    q = q * np.sign(np.diag(r))[None, :]
    return q[:, 1:]


# --------------------------------------------------------------------------- assembly


def _ordered_conditions(present: Sequence[str], conditions: Sequence[str]) -> list[str]:
    present_set = list(dict.fromkeys(present))
    if not conditions:
        return sorted(present_set)
    if len(set(conditions)) != len(conditions):
        dup = sorted({c for c in conditions if list(conditions).count(c) > 1})
        raise DesignError(f"conditions list repeats {dup}; list each condition once in events.conditions")
    extra = sorted(set(present_set) - set(conditions))
    if extra:
        warnings.warn(f"events conditions {extra} are not in the configured conditions list and are not modelled "
                      "(they fall into the baseline); add them to events.conditions to model them", GlmstepsWarning,
                      stacklevel=3)
    for c in conditions:
        if c not in present_set:
            warnings.warn(f"condition {c!r} has no events in this run; its columns are all zero and not estimable",
                          GlmstepsWarning, stacklevel=3)
    return list(conditions)


def build_design(events: pd.DataFrame, frame_times_s: npt.ArrayLike, *, hrf: ResponseModel = "double_gamma",
                 dt_s: float = 0.1, fir_bins: int = 0, fir_bin_width_s: float = 0.0,
                 drift_basis: DriftModel = "cosine", cutoff_s: float = 128.0, legendre_order: int = 3,
                 confounds: pd.DataFrame | None = None, conditions: Sequence[str] = (),
                 modulators: Mapping[str, Sequence[str]] | None = None) -> Design:
    """Assemble the design matrix of one run.

    Parameters
    ----------
    events : DataFrame, columns onset (s), duration (s), condition, modulators...
        Clean events (one row per event).
    frame_times_s : array_like, shape (n_scans,)
        Frame times of the rows to model (seconds, absolute; see :func:`frame_times`).
    hrf : {"double_gamma", "double_gamma_latency", "double_gamma_latency_width", "glover_1999", "fir"}
        Response model (:func:`glmsteps.hrf.hrf_basis`).
    dt_s : float
        Oversampling step (seconds, <= 0.1).
    fir_bins : int
        FIR bins (``fir`` only).
    fir_bin_width_s : float
        FIR bin width (seconds, ``fir`` only).
    drift_basis : {"cosine", "legendre", "none"}
        Slow drift basis.
    cutoff_s : float
        Cosine drift cutoff period (seconds).
    legendre_order : int
        Highest Legendre degree.
    confounds : DataFrame, shape (n_scans, n_confounds), optional
        Nuisance columns aligned with ``frame_times_s``; ``spike_*`` columns
        get the role ``spike``. All-zero spike columns (a censored volume that
        is not modelled here) are dropped with a warning.
    conditions : sequence of str
        Conditions to model, in column order; absent ones give all-zero
        columns (with a warning). Empty: the sorted conditions of ``events``.
    modulators : mapping of condition to sequence of str
        Parametric modulator columns of ``events`` for each condition.

    Returns
    -------
    Design

    Notes
    -----
    A modulator column m of condition c is built from amplitudes m_e - mean(m)
    over c's events (mean-centred within the condition, so it is orthogonal
    in the stimulus domain to c's unmodulated regressor when durations are
    equal; Buchel, Wise, Mummery, Poline & Friston 1996, "Nonlinear
    regression in parametric activation studies", NeuroImage 4:60-66),
    convolved with the main kernel of the model. An intercept column is
    always added last.
    """
    mods: Mapping[str, Sequence[str]] = modulators or {}
    ft = _check_frames(frame_times_s)
    if hrf not in HRF_MODELS:
        raise DesignError(f"unknown response model {hrf!r}; set design.hrf to one of {', '.join(HRF_MODELS)}")
    if drift_basis not in DRIFT_MODELS:
        raise DesignError(f"unknown drift basis {drift_basis!r}; set design.drift.basis to one of "
                          f"{', '.join(DRIFT_MODELS)}")
    dt = _check_dt(dt_s)
    for col in ("onset", "duration", "condition"):
        if col not in events.columns:
            raise DesignError(f"events table has no {col!r} column; found {list(events.columns)}")
    if hrf == "fir" and any(len(v) for v in mods.values()):
        raise DesignError("parametric modulators need a gamma response model, not fir; "
                          "remove events.modulators or choose another design.hrf")
    cond_values = events["condition"].astype(str)
    order = _ordered_conditions(list(cond_values), list(conditions))
    for c in mods:
        if c not in order:
            warnings.warn(f"modulators are given for condition {c!r}, which is not modelled; they are ignored",
                          GlmstepsWarning, stacklevel=2)
    kernels, labels = hrf_basis(hrf, dt, fir_bins=fir_bins, fir_bin_width_s=fir_bin_width_s)

    cols: list[npt.NDArray[np.float64]] = []
    names: list[str] = []
    roles: list[str] = []
    conds: list[str] = []
    basis: list[str] = []
    n = ft.size
    for c in order:
        rows = events.loc[cond_values == c]
        onsets = rows["onset"].to_numpy(dtype=np.float64)
        durations = rows["duration"].to_numpy(dtype=np.float64)
        if len(rows):
            reg = convolve_events(onsets, durations, np.ones(len(rows)), ft, kernels, dt)
        else:
            reg = np.zeros((n, kernels.shape[1]))
        for j, label in enumerate(labels):
            cols.append(reg[:, j])
            names.append(c if label == "main" else f"{c}{BASIS_SEPARATOR}{label}")
            roles.append("interest")
            conds.append(c)
            basis.append(label)
        for m in mods.get(c, ()):
            if m not in events.columns:
                raise DesignError(f"events table has no modulator column {m!r} (condition {c!r}); "
                                  f"found {list(events.columns)}")
            values = pd.to_numeric(rows[m], errors="coerce").to_numpy(dtype=np.float64)
            bad = np.nonzero(~np.isfinite(values))[0]
            if bad.size:
                raise DesignError(f"events row {rows.index[bad[0]]}: modulator {m!r} of condition {c!r} is "
                                  f"{rows[m].iloc[bad[0]]!r}, expected a number; fill it in or remove the column from events.modulators")
            centred = values - values.mean() if values.size else values
            if values.size and np.allclose(centred, 0.0, atol=1e-12 * max(1.0, float(np.abs(values).max()))):
                warnings.warn(f"modulator {m!r} of condition {c!r} is constant over its events; its column is "
                              "all zero and not estimable", GlmstepsWarning, stacklevel=2)
                centred = np.zeros_like(values)
            if values.size and np.any(centred != 0):
                mreg = convolve_events(onsets, durations, centred, ft, kernels[:, 0], dt)
            else:
                mreg = np.zeros(n)
            cols.append(mreg)
            names.append(f"{c}{MODULATOR_INFIX}{m}")
            roles.append("modulator")
            conds.append(c)
            basis.append("modulator")

    if confounds is not None and confounds.shape[1]:
        if len(confounds) != n:
            raise DesignError(f"confounds table has {len(confounds)} rows but the design has {n} volumes; "
                              "the confounds must have one row per modelled volume")
        for name in confounds.columns:
            values = pd.to_numeric(confounds[name], errors="coerce").to_numpy(dtype=np.float64)
            bad = np.nonzero(~np.isfinite(values))[0]
            if bad.size:
                raise DesignError(f"confounds column {name!r} row {bad[0]}: found {confounds[name].iloc[bad[0]]!r}, "
                                  "expected a finite number; fill missing confound values upstream")
            is_spike = str(name).startswith(SPIKE_PREFIX)
            if is_spike and not np.any(values != 0):
                warnings.warn(f"spike column {name!r} is zero on every modelled volume (its volume was dropped); "
                              "it is left out of the design", GlmstepsWarning, stacklevel=2)
                continue
            cols.append(values)
            names.append(str(name))
            roles.append("spike" if is_spike else "confound")
            conds.append("")
            basis.append("")

    if drift_basis == "cosine":
        drift = cosine_drift(ft, cutoff_s)
    elif drift_basis == "legendre":
        drift = legendre_drift(ft, legendre_order)
    else:
        drift = np.zeros((n, 0))
    for k in range(drift.shape[1]):
        cols.append(drift[:, k])
        names.append(f"{SLOW_PREFIX}{k + 1:02d}")
        roles.append("drift")
        conds.append("")
        basis.append("")
    seen: set[str] = set()
    for name in names:
        if name in seen or name == INTERCEPT:
            raise DesignError(f"design column name {name!r} occurs twice (a condition, modulator or confound "
                              "shares a name); rename the condition or the confound column")
        seen.add(name)
    cols.append(np.ones(n))
    names.append(INTERCEPT)
    roles.append("intercept")
    conds.append("")
    basis.append("")
    return Design(X=np.column_stack(cols).astype(np.float64), names=tuple(names), roles=tuple(roles),
                  conditions=tuple(conds), basis=tuple(basis), frame_times_s=ft.copy())


# --------------------------------------------------------------------------- diagnostics


def scale_columns(X: npt.ArrayLike) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.bool_]]:
    """Divide each non-zero column by its Euclidean norm.

    Returns
    -------
    scaled : ndarray, shape (n_scans, n_nonzero), float64
        The non-zero columns, each of unit length.
    nonzero : ndarray of bool, shape (n_regressors,)
        Which columns of ``X`` were kept.

    Notes
    -----
    Equilibration to unit column length before a singular value analysis, as
    in Belsley, Kuh & Welsch (1980), Regression Diagnostics, ch. 3 (from
    memory): the condition number then does not depend on the units of the
    regressors.
    """
    X = np.asarray(X, dtype=np.float64)
    norms = np.linalg.norm(X, axis=0)
    nonzero = norms > 0
    return X[:, nonzero] / norms[nonzero], nonzero


def _rank_tol(s: npt.NDArray[np.float64], shape: tuple[int, int]) -> float:
    return float(s.max() * max(shape) * np.finfo(np.float64).eps) if s.size else 0.0


def collinear_columns(X: npt.ArrayLike, names: Sequence[str]) -> list[str]:
    """Names of the non-zero columns involved in an exact linear dependence.

    Parameters
    ----------
    X : array_like, shape (n_scans, n_regressors)
    names : sequence of str, length n_regressors

    Returns
    -------
    list of str
        Columns with a loading above 1e-6 in some null vector of the
        column-scaled X (singular values below max(n, p) eps s_max, the
        numpy matrix_rank tolerance); empty when X has full column rank.
    """
    scaled, nonzero = scale_columns(X)
    kept = [n for n, k in zip(names, nonzero) if k]
    if scaled.shape[1] == 0:
        return []
    _, s, vt = np.linalg.svd(scaled, full_matrices=True)
    s_full = np.zeros(scaled.shape[1])
    s_full[: s.size] = s
    null = vt[s_full <= _rank_tol(s, scaled.shape)]
    if null.shape[0] == 0:
        return []
    involved = np.any(np.abs(null) > 1e-6, axis=0)
    return [n for n, inv in zip(kept, involved) if inv]


def variance_inflation(X: npt.ArrayLike, j: int) -> float:
    """Variance inflation factor of column ``j`` of ``X`` against all other columns.

    Parameters
    ----------
    X : array_like, shape (n_scans, n_regressors)
        Design including an intercept column.
    j : int
        Column index.

    Returns
    -------
    float
        VIF_j = 1 / (1 - R_j^2), R_j^2 the (centred) coefficient of
        determination of the least-squares regression of column j on the
        others; inf when column j is a combination of the others, NaN for a
        constant column.

    Notes
    -----
    Marquardt (1970), "Generalized inverses, ridge regression, biased linear
    estimation, and nonlinear estimation", Technometrics 12:591-612 (from
    memory). Assumes the other columns include a constant, so R^2 uses the
    centred total sum of squares.
    """
    X = np.asarray(X, dtype=np.float64)
    y = X[:, j]
    others = np.delete(X, j, axis=1)
    tss = float(np.sum((y - y.mean()) ** 2))
    if tss <= 0:
        return float("nan")
    coef, *_ = np.linalg.lstsq(others, y, rcond=None)
    rss = float(np.sum((y - others @ coef) ** 2))
    if rss <= tss * 1e-14:
        return float("inf")
    return tss / rss


def correlation_matrix(X: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Pearson correlation between the columns of ``X``; NaN where a column is constant.

    Returns
    -------
    ndarray, shape (n_regressors, n_regressors), float64
    """
    X = np.asarray(X, dtype=np.float64)
    centred = X - X.mean(axis=0)
    norms = np.linalg.norm(centred, axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        unit = centred / np.where(norms > 1e-12 * max(1.0, float(np.abs(X).max(initial=0.0))), norms, np.nan)
    corr = unit.T @ unit
    np.fill_diagonal(corr, np.where(np.isfinite(np.diag(corr)), 1.0, np.nan))
    return np.clip(corr, -1.0, 1.0)


def _pinv(X: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    """Pseudo-inverse with the matrix_rank cutoff max(n, p) eps s_max."""
    return np.linalg.pinv(X, rcond=max(X.shape) * np.finfo(np.float64).eps)


def _finite_or_none(a: npt.NDArray[np.float64]) -> Any:
    if a.ndim == 0:
        return float(a) if np.isfinite(a) else None
    return [_finite_or_none(v) for v in a]


def design_diagnostics(design: Design, *, allow_rank_deficient: bool = False) -> dict[str, Any]:
    """Rank, conditioning, variance inflation and correlations of a design.

    Parameters
    ----------
    design : Design
    allow_rank_deficient : bool
        Report collinear columns instead of raising (used for runs excluded upstream).

    Returns
    -------
    dict
        ``rank`` (of the non-zero columns), ``n_regressors``,
        ``condition_number`` (of the unit-length-column X, non-zero columns),
        ``non_estimable`` (all-zero columns), ``collinear`` (columns in an
        exact dependence; empty unless allowed), ``vif`` (name -> VIF for the
        interest and modulator columns; None where undefined or infinite),
        ``correlation`` ({"names": [...], "values": [[...]]}, None where
        undefined).

    Raises
    ------
    DesignError
        When the non-zero columns are linearly dependent (naming them).

    Notes
    -----
    Condition number = s_max / s_min of the column-scaled X (Belsley, Kuh &
    Welsch 1980); rank counts singular values above max(n, p) eps s_max.
    """
    X = design.X
    names = list(design.names)
    scaled, nonzero = scale_columns(X)
    s = np.linalg.svd(scaled, compute_uv=False) if scaled.shape[1] else np.zeros(0)
    rank = int(np.sum(s > _rank_tol(s, scaled.shape))) if s.size else 0
    collinear: list[str] = []
    if rank < scaled.shape[1]:
        collinear = collinear_columns(X, names)
        if not allow_rank_deficient:
            raise DesignError(f"design is rank deficient (rank {rank} of {scaled.shape[1]} non-zero columns): "
                              f"columns {', '.join(collinear)} are linearly dependent; remove or merge one of them "
                              "(e.g. a confound duplicating another column or the intercept)")
    cond = float(s.max() / s.min()) if s.size and s.min() > 0 and rank == scaled.shape[1] else float("inf")
    vif = {}
    for j, (name, role) in enumerate(zip(names, design.roles)):
        if role in ("interest", "modulator"):
            vif[name] = _finite_or_none(np.asarray(variance_inflation(X, j))) if nonzero[j] else None
    corr = correlation_matrix(X)
    return {
        "rank": rank,
        "n_regressors": len(names),
        "condition_number": cond if np.isfinite(cond) else None,
        "non_estimable": [n for n, k in zip(names, nonzero) if not k],
        "collinear": collinear,
        "vif": vif,
        "correlation": {"names": names, "values": _finite_or_none(corr)},
    }
