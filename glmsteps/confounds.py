"""Confound selection, expansion and censoring.

Pure module: a confounds table (one row per volume, read by
:func:`glmsteps.fileio.read_tsv`) in, nuisance regressors and a censoring mask
out. ``source`` only names the file in messages; no file is opened here.

Row numbers in messages are 1-based data rows of the TSV (header line not
counted); volume indices are 0-based, so data row ``r`` is volume ``r - 1``.
"""

from __future__ import annotations

import fnmatch
import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from .errors import ConfigError, ConfoundsError, GlmstepsWarning
from .names import DIFF_SUFFIX, SPIKE_PREFIX, SQUARE_SUFFIX

#: Units of motion columns, read from the end of the column name (``move_x_mm``, ``turn_x_rad``).
MOTION_UNITS: dict[str, str] = {"_mm": "mm", "_rad": "rad", "_deg": "deg"}


def _where(index: int) -> str:
    """Name a row as the user sees it: 1-based data row and 0-based volume."""
    return f"data row {index + 1} (1-based, header line not counted; volume {index})"


def select_columns(table: pd.DataFrame, patterns: Sequence[str], *, source: str) -> list[str]:
    """Column names matching exact names or glob patterns, in table order.

    Parameters
    ----------
    table : DataFrame, shape (n_volumes, n_columns)
        Confounds table.
    patterns : sequence of str
        Exact column names or ``fnmatch`` patterns (``*``, ``?``, ``[abc]``),
        matched case-sensitively. A pattern that is itself a column name
        matches that column.
    source : str
        File the table came from (for messages).

    Returns
    -------
    list of str
        Each matching column once, in the order of the table's columns.

    Raises
    ------
    ConfoundsError
        A pattern matches no column (the message lists the columns present).
    ConfigError
        ``patterns`` is not a list of non-empty strings.
    """
    if isinstance(patterns, str):
        raise ConfigError(f"config confounds.columns is the string {patterns!r}; expected a list of column names "
                          "or patterns")
    columns = [str(c) for c in table.columns]
    chosen: set[str] = set()
    for pattern in patterns:
        if not isinstance(pattern, str) or not pattern:
            raise ConfigError(f"config confounds.columns holds {pattern!r}; expected column names or glob patterns")
        hits = [c for c in columns if c == pattern or fnmatch.fnmatchcase(c, pattern)]
        if not hits:
            raise ConfoundsError(f"{source}: confounds.columns entry '{pattern}' matches no column; columns present: "
                                 f"{columns}; fix the name or pattern")
        chosen.update(hits)
    return [c for c in columns if c in chosen]


def is_derivative_column(name: str, derivative_columns: Sequence[str] = ()) -> bool:
    """True when a column holds a temporal derivative (undefined at volume 0).

    A column is a derivative when its name ends in ``_diff`` or it is listed
    in ``derivative_columns``.
    """
    return name.endswith(DIFF_SUFFIX) or name in derivative_columns


def clean_confound_values(table: pd.DataFrame, *, source: str,
                          derivative_columns: Sequence[str] = ()) -> pd.DataFrame:
    """Parse confound columns as float64, zeroing the undefined first derivative.

    Parameters
    ----------
    table : DataFrame, shape (n_volumes, n_columns)
        The selected confound columns.
    source : str
        File the table came from (for messages).
    derivative_columns : sequence of str
        Further columns (beyond names ending in ``_diff``) that are temporal
        derivatives.

    Returns
    -------
    DataFrame, shape (n_volumes, n_columns), float64
        Values; NaN in the first row of a derivative column set to 0.

    Raises
    ------
    ConfoundsError
        A non-numeric cell, an infinite value, or NaN anywhere except the
        first row of a derivative column (names the column and the row).

    Notes
    -----
    A backward difference ``x[t] - x[t-1]`` has no value at ``t = 0``;
    tables often store ``n/a`` there, and 0 is the usual fill (common
    practice).
    """
    out = {}
    for name in table.columns:
        raw = table[name]
        values = np.array(pd.to_numeric(raw, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan))
        if len(values) and np.isnan(values[0]) and pd.isna(raw.iloc[0]) and \
                is_derivative_column(str(name), derivative_columns):
            values[0] = 0.0
        bad = ~np.isfinite(values)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            cell = raw.iloc[i]
            found = "n/a" if pd.isna(cell) else repr(cell) if isinstance(cell, str) else str(cell)
            raise ConfoundsError(f"{source}: {_where(i)}, column '{name}': found {found}, expected a finite number; "
                                 "fix the table, or leave the column out of confounds.columns (n/a is accepted "
                                 "only in the first row of a derivative column: a name ending in _diff or one "
                                 "listed in confounds.derivative_columns)")
        out[str(name)] = values
    return pd.DataFrame(out, index=pd.RangeIndex(len(table)), columns=[str(c) for c in table.columns])


def backward_difference(values: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """First temporal derivative by backward difference, 0 at the first volume.

    Parameters
    ----------
    values : array_like, shape (n_volumes,) or (n_volumes, n_columns)
        Time series down axis 0.

    Returns
    -------
    ndarray, same shape, float64
        ``d[0] = 0``, ``d[t] = x[t] - x[t-1]`` for ``t >= 1``.

    Notes
    -----
    Friston et al. (1996), "Movement-related effects in fMRI time-series",
    Magn. Reson. Med. 35:346-355 (citation from memory), model motion with
    the parameters, their history and squares; the derivative form here is
    the backward difference.
    """
    x = np.asarray(values, dtype=np.float64)
    d = np.zeros_like(x)
    d[1:] = x[1:] - x[:-1]
    return d


def expand_confounds(table: pd.DataFrame, *, derivatives: bool, squares: bool, source: str = "") -> pd.DataFrame:
    """Add temporal derivatives and squares of confound columns.

    Parameters
    ----------
    table : DataFrame, shape (n_volumes, k), float64
        Original confound columns.
    derivatives : bool
        Add ``<name>_diff`` (backward difference, first row 0).
    squares : bool
        Add ``<name>_sq`` and, with ``derivatives``, ``<name>_diff_sq``.
    source : str
        File the table came from (named in messages when given).

    Returns
    -------
    DataFrame, shape (n_volumes, k * m), float64
        ``m`` is 1, 2 (one option) or 4 (both). Column order: originals,
        derivatives, squares of originals, squares of derivatives.

    Raises
    ------
    ConfoundsError
        An expanded name equals a column already in the table.

    Notes
    -----
    With both options, 6 motion parameters give the 24-parameter model
    ``[x, dx, x^2, dx^2]`` (Friston et al. 1996, Magn. Reson. Med.
    35:346-355), ``dx[t] = x[t] - x[t-1]``, ``dx[0] = 0``.
    """
    names = [str(c) for c in table.columns]
    x = table.to_numpy(dtype=np.float64)
    blocks: list[tuple[list[str], npt.NDArray[np.float64]]] = [(names, x)]
    d = backward_difference(x)
    if derivatives:
        blocks.append(([n + DIFF_SUFFIX for n in names], d))
    if squares:
        blocks.append(([n + SQUARE_SUFFIX for n in names], x ** 2))
    if derivatives and squares:
        blocks.append(([n + DIFF_SUFFIX + SQUARE_SUFFIX for n in names], d ** 2))
    all_names = [n for block_names, _ in blocks for n in block_names]
    seen: set[str] = set()
    for n in all_names:
        if n in seen:
            raise ConfoundsError(f"{source + ': ' if source else ''}expanded confound column '{n}' clashes with a "
                                 "selected column of the same name; leave that column out of confounds.columns or "
                                 "set confounds.derivatives / confounds.squares to false")
        seen.add(n)
    data = np.hstack([values for _, values in blocks]) if names else np.zeros((len(table), 0))
    return pd.DataFrame(data, columns=all_names, index=pd.RangeIndex(len(table)))


def standardise_columns(table: pd.DataFrame, kept: npt.NDArray[np.bool_], *, demean: bool,
                        scale: bool) -> pd.DataFrame:
    """Centre and/or scale columns using statistics of the kept volumes only.

    Parameters
    ----------
    table : DataFrame, shape (n_volumes, k), float64
        Regressors.
    kept : ndarray of bool, shape (n_volumes,)
        Volumes that enter the model (not dropped).
    demean : bool
        Subtract each column's mean over the kept volumes.
    scale : bool
        Divide each column by its standard deviation over the kept volumes
        (``ddof=1``); a column constant over the kept volumes is left unscaled
        with a warning.

    Returns
    -------
    DataFrame, shape (n_volumes, k), float64
        All rows transformed with the kept-volume statistics.

    Notes
    -----
    ``z[t] = (x[t] - mean_kept(x)) / sd_kept(x)`` with
    ``sd = sqrt(sum (x - mean)^2 / (n_kept - 1))`` (common practice).
    """
    x = table.to_numpy(dtype=np.float64).copy()
    kept = np.asarray(kept, dtype=bool)
    if demean and x.shape[1]:
        x -= x[kept].mean(axis=0)
    if scale and x.shape[1]:
        sd = x[kept].std(axis=0, ddof=1) if kept.sum() > 1 else np.zeros(x.shape[1])
        flat = ~(sd > 0)
        for j in np.flatnonzero(flat):
            warnings.warn(f"confound column '{table.columns[j]}' is constant over the kept volumes; not scaled "
                          "(it is collinear with the intercept; consider leaving it out)", GlmstepsWarning,
                          stacklevel=2)
        x[:, ~flat] /= sd[~flat]
    return pd.DataFrame(x, columns=list(table.columns), index=pd.RangeIndex(len(table)))


def censor_volumes(values: npt.ArrayLike, threshold: float, *, volumes_before: int, volumes_after: int,
                   n_dropped: int) -> npt.NDArray[np.bool_]:
    """Mark volumes to censor: those above a threshold and their neighbours.

    Parameters
    ----------
    values : array_like, shape (n_volumes,)
        Per-volume motion summary, e.g. framewise displacement (mm).
    threshold : float
        Volumes with ``value > threshold`` are censored (same unit).
    volumes_before : int
        Also censor this many volumes before each such volume.
    volumes_after : int
        Also censor this many volumes after each such volume.
    n_dropped : int
        Initial volumes removed from the model; never marked, and their
        values never trigger censoring.

    Returns
    -------
    ndarray of bool, shape (n_volumes,)
        True for censored volumes.

    Notes
    -----
    Power et al. (2012), "Spurious but systematic correlations in functional
    connectivity MRI networks arise from subject motion", NeuroImage
    59:2142-2154, censor volumes with framewise displacement > 0.5 mm plus
    one volume before and two after (from memory). Here volume ``t`` is
    censored when some kept ``s`` with ``values[s] > threshold`` has
    ``s - volumes_before <= t <= s + volumes_after``.
    """
    v = np.asarray(values, dtype=np.float64)
    if v.ndim != 1:
        raise ValueError(f"values must be one-dimensional, got shape {v.shape}")
    n = v.shape[0]
    if not math.isfinite(threshold):
        raise ValueError(f"threshold must be finite, got {threshold!r}")
    if volumes_before < 0 or volumes_after < 0 or not 0 <= n_dropped <= n:
        raise ValueError("volumes_before/volumes_after must be >= 0 and n_dropped within [0, n_volumes]")
    kept = np.arange(n) >= n_dropped
    trigger = np.flatnonzero(kept & (v > threshold))
    censored = np.zeros(n, dtype=bool)
    for s in trigger:
        censored[max(0, s - volumes_before): s + volumes_after + 1] = True
    censored[:n_dropped] = False
    return censored


def spike_regressors(censored: npt.ArrayLike) -> pd.DataFrame:
    """One-hot regressors, one per censored volume.

    Parameters
    ----------
    censored : array_like of bool, shape (n_volumes,)
        Censoring mask.

    Returns
    -------
    DataFrame, shape (n_volumes, n_censored), float64
        Column ``spike_<volume index, 4 digits>`` is 1 at that volume and 0
        elsewhere.

    Notes
    -----
    Adding a one-hot regressor per censored volume is equivalent to removing
    that volume from the least-squares fit: the column fits that volume's
    value exactly, and by the Frisch-Waugh-Lovell theorem the other betas are
    those of the fit without it.
    """
    mask = np.asarray(censored, dtype=bool)
    index = np.flatnonzero(mask)
    data = np.zeros((mask.size, index.size), dtype=np.float64)
    data[index, np.arange(index.size)] = 1.0
    return pd.DataFrame(data, columns=[f"{SPIKE_PREFIX}{i:04d}" for i in index], index=pd.RangeIndex(mask.size))


@dataclass(frozen=True)
class ConfoundSet:
    """The nuisance regressors and censoring of one run.

    Attributes
    ----------
    regressors : DataFrame, shape (n_volumes, n_regressors), float64
        Selected (and expanded, centred, scaled) columns, then spike columns.
    censored : ndarray of bool, shape (n_volumes,)
        Censored volumes.
    n_dropped : int
        Initial volumes removed from the model.
    censored_fraction : float
        Censored volumes / kept volumes.
    excluded : bool
        True when ``censored_fraction`` exceeds the allowed maximum.
    exclusion_reason : str
        Why the run is excluded ("" when it is not).
    selected_columns : tuple of str
        The selected original columns, before expansion.
    """

    regressors: pd.DataFrame
    censored: npt.NDArray[np.bool_]
    n_dropped: int
    censored_fraction: float
    excluded: bool
    exclusion_reason: str
    selected_columns: tuple[str, ...] = field(default=())


def _is_whole(value: Any) -> bool:
    return not isinstance(value, bool) and isinstance(value, (int, np.integer))


def _is_number(value: Any) -> bool:
    return (not isinstance(value, bool) and isinstance(value, (int, float, np.integer, np.floating))
            and math.isfinite(value))


def _check_settings(table: pd.DataFrame, *, source: str, columns: Sequence[str], flags: dict[str, Any],
                    censor_column: str | None, censor_threshold: float | None, volumes_before: int,
                    volumes_after: int, drop_initial_volumes: int, max_censored_fraction: float,
                    derivative_columns: Sequence[str]) -> None:
    """Validate every setting of :func:`prepare_confounds` before any work."""
    present = [str(c) for c in table.columns]
    if isinstance(columns, str) or not isinstance(columns, Sequence):
        raise ConfigError(f"config confounds.columns is {columns!r}; expected a list of column names or patterns")
    for key, value in flags.items():
        if not isinstance(value, (bool, np.bool_)):
            raise ConfigError(f"config confounds.{key} is {value!r}; expected true or false")
    if isinstance(derivative_columns, str):
        raise ConfigError(f"config confounds.derivative_columns is the string {derivative_columns!r}; "
                          "expected a list of column names")
    if len(table) == 0:
        raise ConfoundsError(f"{source}: the confounds table has no data rows; expected one row per volume")
    if censor_column is not None:
        if not isinstance(censor_column, str) or censor_column not in table.columns:
            raise ConfoundsError(f"{source}: censor column {censor_column!r} not found; columns present: {present}; "
                                 "set confounds.censor.column to one of them or set confounds.censor to null")
        if not _is_number(censor_threshold):
            raise ConfigError(f"config confounds.censor.threshold is {censor_threshold!r}; expected a finite number "
                              "in the unit of the censor column (e.g. 0.5 mm)")
        for key, value in (("volumes_before", volumes_before), ("volumes_after", volumes_after)):
            if not _is_whole(value) or value < 0:
                raise ConfigError(f"config confounds.censor.{key} is {value!r}; expected a whole number >= 0")
    if not _is_whole(drop_initial_volumes) or drop_initial_volumes < 0:
        raise ConfigError(f"config confounds.drop_initial_volumes is {drop_initial_volumes!r}; "
                          "expected a whole number of volumes >= 0")
    if drop_initial_volumes >= len(table):
        raise ConfoundsError(f"{source}: confounds.drop_initial_volumes is {drop_initial_volumes} but the table has "
                             f"only {len(table)} rows (volumes); lower confounds.drop_initial_volumes")
    if not _is_number(max_censored_fraction) or not 0 <= max_censored_fraction <= 1:
        raise ConfigError(f"config confounds.max_censored_fraction is {max_censored_fraction!r}; "
                          "expected a number between 0 and 1")


def prepare_confounds(table: pd.DataFrame, *, source: str, columns: Sequence[str], derivatives: bool,
                      squares: bool, demean: bool, scale: bool, censor_column: str | None,
                      censor_threshold: float | None, volumes_before: int, volumes_after: int,
                      drop_initial_volumes: int, max_censored_fraction: float,
                      derivative_columns: Sequence[str] = ()) -> ConfoundSet:
    """Select, expand, standardise and censor the confounds of one run.

    Parameters
    ----------
    table : DataFrame, shape (n_volumes, n_columns)
        Confounds table, one row per volume.
    source : str
        File the table came from (for messages).
    columns : sequence of str
        Names or glob patterns of the columns to use (see :func:`select_columns`).
    derivatives, squares : bool
        Expansions (see :func:`expand_confounds`).
    demean, scale : bool
        Standardisation over the kept volumes (see :func:`standardise_columns`).
    censor_column : str or None
        Column holding the per-volume censoring measure (e.g. framewise
        displacement, mm); None for no censoring. Its first row may be ``n/a``
        (a displacement between volumes is undefined at volume 0) and is then
        taken as 0.
    censor_threshold : float or None
        Censor volumes with a value above this.
    volumes_before, volumes_after : int
        Neighbours censored with each such volume.
    drop_initial_volumes : int
        Initial volumes left out of the model (never censored).
    max_censored_fraction : float
        The run is excluded when the censored fraction of the kept volumes
        exceeds this (0..1).
    derivative_columns : sequence of str
        Extra column names treated as derivatives (first-row ``n/a`` -> 0).

    Returns
    -------
    ConfoundSet

    Raises
    ------
    ConfoundsError
        Unknown column or censor column, bad values, or nothing left after
        dropping volumes.
    ConfigError
        A setting of the wrong type or out of range.

    Warns
    -----
    GlmstepsWarning
        The run is excluded (too many censored volumes); a column is constant
        when scaling.

    Notes
    -----
    ``censored_fraction = n_censored / (n_volumes - drop_initial_volumes)``;
    censoring follows Power et al. (2012), NeuroImage 59:2142-2154 (citation
    from memory); each censored volume gets a one-hot spike regressor.
    """
    flags = {"derivatives": derivatives, "squares": squares, "demean": demean, "scale": scale}
    _check_settings(table, source=source, columns=columns, flags=flags, censor_column=censor_column,
                    censor_threshold=censor_threshold, volumes_before=volumes_before, volumes_after=volumes_after,
                    drop_initial_volumes=drop_initial_volumes, max_censored_fraction=max_censored_fraction,
                    derivative_columns=derivative_columns)
    selected = select_columns(table, columns, source=source)
    values = clean_confound_values(table[selected], source=source, derivative_columns=derivative_columns)
    if censor_column is not None:
        measure = clean_confound_values(table[[censor_column]], source=source,
                                        derivative_columns=[censor_column])[censor_column].to_numpy()
    expanded = expand_confounds(values, derivatives=bool(derivatives), squares=bool(squares), source=source)

    n_volumes = len(table)
    n_dropped = int(drop_initial_volumes)
    kept = np.arange(n_volumes) >= n_dropped
    regressors = standardise_columns(expanded, kept, demean=bool(demean), scale=bool(scale))

    if censor_column is not None:
        censored = censor_volumes(measure, float(censor_threshold), volumes_before=int(volumes_before),
                                  volumes_after=int(volumes_after), n_dropped=n_dropped)
    else:
        censored = np.zeros(n_volumes, dtype=bool)
    spikes = spike_regressors(censored)
    clash = sorted(set(spikes.columns) & set(regressors.columns))
    if clash:
        raise ConfoundsError(f"{source}: selected column '{clash[0]}' has the name of a censoring regressor; "
                             "leave it out of confounds.columns")
    regressors = pd.concat([regressors, spikes], axis=1)

    n_kept = int(kept.sum())
    n_censored = int(censored.sum())
    fraction = n_censored / n_kept
    excluded = fraction > max_censored_fraction
    reason = ""
    if excluded:
        reason = (f"{n_censored} of {n_kept} kept volumes censored ({fraction:.1%}) with {censor_column} > "
                  f"{censor_threshold:g}, more than confounds.max_censored_fraction {max_censored_fraction:g}")
        warnings.warn(f"{source}: run excluded: {reason}", GlmstepsWarning, stacklevel=2)
    return ConfoundSet(regressors=regressors, censored=censored, n_dropped=n_dropped, censored_fraction=fraction,
                       excluded=bool(excluded), exclusion_reason=reason, selected_columns=tuple(selected))


def check_row_count(table: pd.DataFrame, n_volumes: int, *, source: str, bold: str) -> None:
    """A confounds table must have one data row per BOLD volume.

    Raises
    ------
    ConfoundsError
        Names the confounds file, its row count and the BOLD's volume count.
    """
    if len(table) != n_volumes:
        raise ConfoundsError(f"{source}: {len(table)} data rows (header line not counted) but the BOLD {bold} has "
                             f"{n_volumes} volumes; expected one row per volume; check that inputs.confounds points "
                             "at this run's table, or regenerate it")


def column_unit(name: str) -> str | None:
    """Unit of a motion column from the end of its name (``_mm``, ``_rad``, ``_deg``), None otherwise.

    Examples
    --------
    >>> column_unit("move_x_mm"), column_unit("turn_z_rad"), column_unit("white_matter_mean")
    ('mm', 'rad', None)
    """
    for suffix, unit in MOTION_UNITS.items():
        if name.endswith(suffix):
            return unit
    return None


def motion_summary(traces: pd.DataFrame, *, n_dropped: int, censor_values: npt.ArrayLike | None = None,
                   censor_column: str | None = None, censor_defined: npt.ArrayLike | None = None,
                   censor_threshold: float | None = None) -> dict[str, Any]:
    """Head-motion summary of a run over the volumes kept in the model.

    Parameters
    ----------
    traces : DataFrame, shape (n_volumes, k), float64
        The selected confound columns (before expansion); the motion columns
        among them are those with a unit suffix (:func:`column_unit`).
    n_dropped : int
        Initial volumes left out of the model (not summarised).
    censor_values : array_like, shape (n_volumes,), optional
        The censoring measure (e.g. framewise displacement, mm).
    censor_column : str, optional
        Its column name.
    censor_defined : array_like of bool, shape (n_volumes,), optional
        Volumes where the measure was given (its first row is often ``n/a``:
        a displacement between volumes is undefined at volume 0).
    censor_threshold : float, optional
        Censoring threshold (counted: volumes above it).

    Returns
    -------
    dict
        ``{"volumes_summarised", "columns": {name: {"unit", "max_abs",
        "max_abs_volume"}}, "censor": None or {"column", "mean", "max",
        "max_volume", "n_above_threshold", "threshold"}}``; volume indices are
        0-based.

    Notes
    -----
    Mean and maximum framewise displacement per run are the usual
    head-motion summaries (Power et al. 2012, NeuroImage 59:2142-2154, from
    memory); here they are taken over the kept volumes where the measure is
    defined.
    """
    n = len(traces)
    kept = np.arange(n) >= n_dropped
    columns = {}
    for name in traces.columns:
        unit = column_unit(str(name))
        if unit is None:
            continue
        values = np.abs(traces[name].to_numpy(dtype=np.float64))
        masked = np.where(kept, values, -np.inf)
        j = int(np.argmax(masked))
        columns[str(name)] = {"unit": unit, "max_abs": float(values[j]), "max_abs_volume": j}
    censor = None
    if censor_values is not None:
        values = np.asarray(censor_values, dtype=np.float64)
        use = kept & (np.ones(values.shape, dtype=bool) if censor_defined is None
                      else np.asarray(censor_defined, dtype=bool))
        if use.any():
            j = int(np.flatnonzero(use)[np.argmax(values[use])])
            censor = {"column": censor_column, "mean": float(values[use].mean()), "max": float(values[j]),
                      "max_volume": j, "threshold": censor_threshold,
                      "n_above_threshold": None if censor_threshold is None
                      else int(np.sum(values[use] > censor_threshold))}
    return {"volumes_summarised": int(kept.sum()), "columns": columns, "censor": censor}
