"""Events-table validation: a BIDS-style events table in, a clean table and a summary out.

Pure module: it takes a :class:`pandas.DataFrame` (read by
:func:`glmsteps.fileio.read_tsv`, so BIDS ``n/a`` cells are already NaN) and
never opens a file. ``source`` is only used to name the file in messages.

Row numbers in messages are 1-based *data* rows, as a reader counts them in
the TSV below its header line (data row 1 is the second line of the file).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd

from .errors import ConfigError, DataError, EventsError, GlmstepsWarning

#: Columns of the cleaned table, before the modulator columns.
CLEAN_COLUMNS: tuple[str, ...] = ("onset", "duration", "condition")
#: ``events.duplicate_events``: what to do with rows repeating an earlier row's onset, duration and condition.
DuplicatePolicy = Literal["error", "keep_first", "keep_all"]
DUPLICATE_POLICIES: tuple[str, ...] = ("error", "keep_first", "keep_all")
#: ``events.missing_duration``: what an ``n/a`` duration means.
MissingDurationPolicy = Literal["error", "impulse"]
MISSING_DURATION_POLICIES: tuple[str, ...] = ("error", "impulse")
#: How many row numbers a warning lists before it abbreviates.
_MAX_LISTED_ROWS = 10


def format_row(index: int) -> str:
    """Name a table row as the user sees it in the TSV.

    Parameters
    ----------
    index : int
        0-based position of the row in the DataFrame.

    Returns
    -------
    str
        ``"data row <index + 1> (1-based, header line not counted)"``.
    """
    return f"data row {index + 1} (1-based, header line not counted)"


def _list_rows(indices: Sequence[int]) -> str:
    """1-based data-row numbers as a short comma list (abbreviated after 10)."""
    shown = [str(i + 1) for i in indices[:_MAX_LISTED_ROWS]]
    more = len(indices) - len(shown)
    return ", ".join(shown) + (f" and {more} more" if more > 0 else "")


def _cell(value: Any) -> str:
    """A table cell as quoted in a message (``n/a`` for missing)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    return repr(value) if isinstance(value, str) else str(value)


def _is_missing(value: Any) -> bool:
    """True for NaN/None cells and blank strings."""
    if value is None:
        return True
    if isinstance(value, str):
        return value.strip() == ""
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


def _numeric_column(table: pd.DataFrame, column: str) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.bool_],
                                                              npt.NDArray[np.bool_]]:
    """Parse one column as float64.

    Returns
    -------
    values : ndarray, shape (n_rows,), float64
        Parsed values (NaN where missing or not a number).
    missing : ndarray of bool, shape (n_rows,)
        Cells that were empty / ``n/a``.
    non_numeric : ndarray of bool, shape (n_rows,)
        Cells that hold text that is not a number.
    """
    raw = table[column]
    missing = np.array([_is_missing(v) for v in raw], dtype=bool)
    values = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    non_numeric = np.isnan(values) & ~missing
    return values, missing, non_numeric


def _check_arguments(n_volumes: int, repetition_time_s: float, condition_column: str,
                     modulators: Mapping[str, Sequence[str]], duplicate_events: str,
                     missing_duration: str) -> None:
    """Validate the settings passed to :func:`validate_events`."""
    if isinstance(n_volumes, bool) or not isinstance(n_volumes, (int, np.integer)) or n_volumes < 1:
        raise DataError(f"the BOLD series has {n_volumes!r} volumes; expected a positive whole number of volumes")
    if (isinstance(repetition_time_s, bool) or not isinstance(repetition_time_s, (int, float, np.floating))
            or not math.isfinite(repetition_time_s) or repetition_time_s <= 0):
        raise ConfigError(f"repetition time {repetition_time_s!r}; expected a positive number of seconds "
                          "(from the run's BIDS sidecar or acquisition.repetition_time_s)")
    if not isinstance(condition_column, str) or not condition_column:
        raise ConfigError(f"config events.condition_column is {condition_column!r}; expected the name of an "
                          "events column")
    if not isinstance(modulators, Mapping):
        raise ConfigError(f"config events.modulators is {modulators!r}; expected a mapping of condition name to a "
                          "list of events columns")
    for condition, columns in modulators.items():
        where = f"config events.modulators.{condition}"
        if isinstance(columns, str) or not isinstance(columns, Sequence):
            raise ConfigError(f"{where} is {columns!r}; expected a list of events column names")
        seen: set[str] = set()
        for name in columns:
            if not isinstance(name, str) or not name:
                raise ConfigError(f"{where} holds {name!r}; expected events column names (text)")
            if name in CLEAN_COLUMNS or name == condition_column:
                raise ConfigError(f"{where} names {name!r}, which is also a column of the cleaned events table; "
                                  f"copy it to a column with another name (e.g. '{name}_value') and use that")
            if name in seen:
                raise ConfigError(f"{where} lists {name!r} twice; list each modulator column once")
            seen.add(name)
    if duplicate_events not in DUPLICATE_POLICIES:
        raise ConfigError(f"config events.duplicate_events is {duplicate_events!r}; expected one of "
                          f"{', '.join(DUPLICATE_POLICIES)}")
    if missing_duration not in MISSING_DURATION_POLICIES:
        raise ConfigError(f"config events.missing_duration is {missing_duration!r}; expected one of "
                          f"{', '.join(MISSING_DURATION_POLICIES)}")


def modulator_columns(modulators: Mapping[str, Sequence[str]]) -> list[str]:
    """Every modulator column of a ``condition -> columns`` mapping once, sorted.

    Examples
    --------
    >>> modulator_columns({"go": ["rt", "force"], "stop": ["rt"]})
    ['force', 'rt']
    """
    return sorted({str(c) for columns in modulators.values() for c in columns})


def _check_columns(table: pd.DataFrame, source: str, condition_column: str,
                   modulator_names: Sequence[str]) -> None:
    """Required and modulator columns must be present."""
    present = [str(c) for c in table.columns]
    for column, what in [("onset", "required"), ("duration", "required"), (condition_column, "condition")] + \
            [(m, "modulator") for m in modulator_names]:
        if column not in table.columns:
            fix = {"required": f"add a '{column}' column (seconds)",
                   "condition": "add it or set events.condition_column to the column holding the condition names",
                   "modulator": "add it or remove it from events.modulators"}[what]
            raise EventsError(f"{source}: missing {what} column '{column}'; columns present: {present}; {fix}")
    if len(table) == 0:
        raise EventsError(f"{source}: the events table has no data rows; add the run's events "
                          "(one row per event with onset, duration and condition)")


def _parse_onsets(table: pd.DataFrame, source: str) -> npt.NDArray[np.float64]:
    onset, missing, non_numeric = _numeric_column(table, "onset")
    for i in range(len(onset)):
        if missing[i] or non_numeric[i] or not math.isfinite(onset[i]):
            found = _cell(table["onset"].iloc[i])
            raise EventsError(f"{source}: {format_row(i)}, column 'onset': found {found}, expected a finite number "
                              "of seconds from the first volume; fill in the onset or delete the row")
    return onset


def _parse_durations(table: pd.DataFrame, source: str,
                     missing_duration: str) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.bool_]]:
    """Durations in seconds and which cells were ``n/a`` (0 s under ``missing_duration: impulse``)."""
    duration, missing, non_numeric = _numeric_column(table, "duration")
    for i in range(len(duration)):
        if non_numeric[i] or (not missing[i] and not math.isfinite(duration[i])):
            found = _cell(table["duration"].iloc[i])
            raise EventsError(f"{source}: {format_row(i)}, column 'duration': found {found}, expected a finite number "
                              "of seconds (0 for an impulse); fix the value")
        if not missing[i] and duration[i] < 0:
            raise EventsError(f"{source}: {format_row(i)}, column 'duration': found {duration[i]:g}, expected a "
                              "duration >= 0 s; fix the value (0 for an impulse)")
    if missing.any():
        rows = np.flatnonzero(missing).tolist()
        if missing_duration == "error":
            raise EventsError(f"{source}: column 'duration' is n/a in data rows {_list_rows(rows)} (1-based, header "
                              "line not counted); a missing duration would be modelled as a 0 s impulse, which "
                              "changes the regressor of a block; write each duration in seconds (0 for an "
                              "impulse), or set events.missing_duration to impulse")
        warnings.warn(f"{source}: column 'duration' is n/a in data rows {_list_rows(rows)} (1-based); modelled as "
                      "0 s impulses (events.missing_duration: impulse)", GlmstepsWarning, stacklevel=2)
        duration = np.where(missing, 0.0, duration)
    return duration, missing


def _parse_conditions(table: pd.DataFrame, source: str, condition_column: str) -> list[str]:
    names = []
    for i, value in enumerate(table[condition_column]):
        if _is_missing(value):
            raise EventsError(f"{source}: {format_row(i)}, column '{condition_column}': found {_cell(value)}, "
                              "expected a condition name; fill it in or delete the row")
        if isinstance(value, (float, np.floating)) and float(value).is_integer():
            value = int(value)
        names.append(str(value))
    return names


def _parse_modulators(table: pd.DataFrame, source: str, modulators: Mapping[str, Sequence[str]],
                      conditions: Sequence[str]) -> dict[str, npt.NDArray[np.float64]]:
    """Modulator columns as float64; finite values required on the rows of the conditions they modulate.

    In BIDS events files a column such as a rating or a response time is
    ``n/a`` on the rows of trial types it does not apply to; those rows never
    enter a modulator regressor, so their cells are kept as NaN (``n/a``).
    """
    names = np.asarray(conditions, dtype=object)
    out = {}
    for column in modulator_columns(modulators):
        values, missing, non_numeric = _numeric_column(table, column)
        modulated = sorted(c for c, cols in modulators.items() if column in cols)
        needed = np.isin(names, modulated)
        bad = needed & (missing | non_numeric | ~np.isfinite(values))
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            condition = str(names[i])
            raise EventsError(f"{source}: {format_row(i)}, modulator column '{column}' of condition '{condition}': "
                              f"found {_cell(table[column].iloc[i])}, expected a finite number on every "
                              f"'{condition}' row; fill it in (e.g. with the condition mean), delete the event, or "
                              f"remove '{column}' from events.modulators.{condition}")
        out[column] = np.where(np.isfinite(values), values, np.nan)
    return out


def find_duplicate_events(onset_s: npt.ArrayLike, duration_s: npt.ArrayLike, conditions: Sequence[str],
                          duration_missing: npt.ArrayLike | None = None) -> list[tuple[int, int]]:
    """Rows that repeat an earlier row's onset, duration and condition exactly.

    Parameters
    ----------
    onset_s, duration_s : array_like, shape (n_events,)
        Onsets and durations (seconds), in file order.
    conditions : sequence of str, length n_events
        Condition of each row.
    duration_missing : array_like of bool, shape (n_events,), optional
        Rows whose duration cell was ``n/a``: two ``n/a`` durations count as
        equal, an ``n/a`` never equals a number.

    Returns
    -------
    list of (int, int)
        ``(first, repeat)`` 0-based row positions, one pair per repeating row,
        in file order of the repeats.

    Notes
    -----
    Two identical rows put two unit-height boxcars on top of each other, so
    the regressor doubles and every beta of that condition halves; when a
    whole file is duplicated every effect halves (issue 20).
    """
    onset = np.asarray(onset_s, dtype=np.float64)
    duration = np.asarray(duration_s, dtype=np.float64)
    missing = (np.zeros(onset.shape, dtype=bool) if duration_missing is None
               else np.asarray(duration_missing, dtype=bool))
    first: dict[tuple[float, Any, str], int] = {}
    pairs: list[tuple[int, int]] = []
    for i, (o, d, m, c) in enumerate(zip(onset, duration, missing, conditions)):
        key = (float(o), "n/a" if m else float(d), str(c))
        if key in first:
            pairs.append((first[key], i))
        else:
            first[key] = i
    return pairs


def _handle_duplicates(source: str, pairs: list[tuple[int, int]], n_rows: int, onset: npt.NDArray[np.float64],
                       duration: npt.NDArray[np.float64], conditions: Sequence[str],
                       policy: str) -> npt.NDArray[np.bool_]:
    """Apply ``events.duplicate_events``; return the rows to keep."""
    keep = np.ones(n_rows, dtype=bool)
    if not pairs:
        return keep
    a, b = pairs[0]
    repeats = [j for _, j in pairs]
    what = (f"{len(repeats)} of {n_rows} rows repeat an earlier row exactly (first: data rows {a + 1} and {b + 1}, "
            f"onset {onset[a]:g} s, duration {duration[a]:g} s, condition '{conditions[a]}')")
    if policy == "error":
        raise EventsError(f"{source}: {what}; two identical events double the regressor and halve its effect; "
                          "delete the repeated rows, or set events.duplicate_events to keep_first (drop the repeats) "
                          "or keep_all (model every row)")
    if policy == "keep_first":
        keep[repeats] = False
        warnings.warn(f"{source}: {what}; the repeats (data rows {_list_rows(repeats)}, 1-based) are dropped "
                      "(events.duplicate_events: keep_first)", GlmstepsWarning, stacklevel=3)
    else:
        warnings.warn(f"{source}: {what}; every row is modelled, so their regressors add up "
                      "(events.duplicate_events: keep_all)", GlmstepsWarning, stacklevel=3)
    return keep


def looks_like_milliseconds(onset_s: npt.ArrayLike, scan_end_s: float) -> bool:
    """True when onsets fit the scan only after dividing them by 1000.

    Parameters
    ----------
    onset_s : array_like, shape (n_events,)
        Onsets as found in the file (meant to be seconds).
    scan_end_s : float
        End of the scan in seconds.

    Returns
    -------
    bool

    Notes
    -----
    Milliseconds are suspected when ``max(onset) / 1000 < scan_end_s``,
    ``max(onset) >= 10 * scan_end_s`` and at least half of the onsets are at
    or after ``scan_end_s``. The last two conditions keep a small overshoot in
    seconds (a truncated run, a wrong TR) from being mistaken for milliseconds:
    in milliseconds every event after the first ``scan_end_s / 1000`` seconds
    is past the end.
    """
    onset = np.asarray(onset_s, dtype=np.float64)
    if onset.size == 0:
        return False
    largest = float(onset.max())
    return (largest / 1000.0 < scan_end_s and largest >= 10.0 * scan_end_s
            and np.mean(onset >= scan_end_s) >= 0.5)


def _check_scan_end(onset: npt.NDArray[np.float64], source: str, scan_end_s: float, n_volumes: int,
                    repetition_time_s: float, rows: npt.NDArray[np.int64] | None = None) -> None:
    """Onsets must fall inside the scan; onsets in milliseconds get their own hint.

    ``rows`` gives the file position of each onset (default: 0, 1, ...).
    """
    where = np.arange(onset.size) if rows is None else np.asarray(rows)
    late = onset >= scan_end_s
    if not late.any():
        return
    scan = f"the scan ends at {scan_end_s:g} s ({n_volumes} volumes x TR {repetition_time_s:g} s)"
    i_max = int(np.argmax(onset))
    if looks_like_milliseconds(onset, scan_end_s):
        raise EventsError(f"{source}: {format_row(int(where[i_max]))}, column 'onset': found {onset[i_max]:g}, but "
                          f"{scan}; the onsets look like milliseconds: divide onset and duration by 1000")
    i = int(np.flatnonzero(late)[0])
    raise EventsError(f"{source}: {format_row(int(where[i]))}, column 'onset': found {onset[i]:g} s, at or after the "
                      f"end of the scan ({scan}); check that the events file belongs to this run and that its "
                      "repetition time (BIDS sidecar RepetitionTime, or acquisition.repetition_time_s) is right")


def clip_durations(onset_s: npt.ArrayLike, duration_s: npt.ArrayLike,
                   scan_end_s: float) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.bool_]]:
    """Shorten events so that none extends past the end of the scan.

    Parameters
    ----------
    onset_s : array_like, shape (n_events,)
        Event onsets in seconds from the first volume.
    duration_s : array_like, shape (n_events,)
        Event durations in seconds (>= 0).
    scan_end_s : float
        End of the scan in seconds (``n_volumes * repetition_time_s``).

    Returns
    -------
    duration_s : ndarray, shape (n_events,), float64
        Durations with ``onset + duration <= scan_end_s``.
    clipped : ndarray of bool, shape (n_events,)
        Events whose duration was shortened.

    Notes
    -----
    The scan covers ``[0, n_volumes * TR)`` seconds, the last volume starting
    at ``(n_volumes - 1) * TR`` (common practice for the frame-time grid). An
    event ending after ``scan_end_s`` gets ``duration = scan_end_s - onset``.
    """
    onset = np.asarray(onset_s, dtype=np.float64)
    duration = np.asarray(duration_s, dtype=np.float64)
    clipped = onset + duration > scan_end_s
    return np.where(clipped, scan_end_s - onset, duration), clipped


def find_overlaps(onset_s: npt.ArrayLike, duration_s: npt.ArrayLike) -> list[tuple[int, int]]:
    """Pairs of overlapping events within one condition.

    Parameters
    ----------
    onset_s : array_like, shape (n_events,)
        Onsets in seconds, sorted ascending.
    duration_s : array_like, shape (n_events,)
        Durations in seconds.

    Returns
    -------
    list of (int, int)
        ``(earlier, later)`` positions: ``later`` starts before an earlier
        event of the condition has ended, or at the same onset as ``earlier``.

    Notes
    -----
    Event ``j`` overlaps when ``onset[j] < max_{k<j}(onset[k] + duration[k])``
    or ``onset[j] == onset[j-1]`` (two impulses at one time); ``earlier`` is
    the event holding that running maximum end (or the previous event).
    """
    onset = np.asarray(onset_s, dtype=np.float64)
    end = onset + np.asarray(duration_s, dtype=np.float64)
    pairs: list[tuple[int, int]] = []
    holder = 0
    for j in range(1, len(onset)):
        if onset[j] < end[holder]:
            pairs.append((holder, j))
        elif onset[j] == onset[j - 1]:
            pairs.append((j - 1, j))
        if end[j] > end[holder]:
            holder = j
    return pairs


def summarise_events(clean: pd.DataFrame, *, scan_end_s: float, n_clipped: int, n_rows: int | None = None,
                     n_duplicates: int = 0, n_missing_durations: int = 0) -> dict[str, Any]:
    """Counts and total durations per condition of a cleaned events table.

    Parameters
    ----------
    clean : DataFrame, shape (n_events, 3 + n_modulators)
        Output table of :func:`validate_events`.
    scan_end_s : float
        End of the scan in seconds.
    n_clipped : int
        Number of events whose duration was clipped.
    n_rows : int, optional
        Data rows of the file (default: the events of ``clean``).
    n_duplicates : int
        Rows repeating an earlier row exactly (dropped or kept, see
        ``events.duplicate_events``).
    n_missing_durations : int
        Rows whose ``n/a`` duration was modelled as a 0 s impulse.

    Returns
    -------
    dict
        ``{"n_events", "n_rows", "conditions": {name: {"count",
        "total_duration_s"}}, "scan_end_s", "clipped", "duplicate_rows",
        "missing_durations"}``.
    """
    conditions = {}
    for name in sorted(set(clean["condition"])):
        rows = clean["condition"] == name
        conditions[name] = {"count": int(rows.sum()),
                            "total_duration_s": float(clean.loc[rows, "duration"].sum())}
    return {"n_events": int(len(clean)), "n_rows": int(len(clean) if n_rows is None else n_rows),
            "conditions": conditions, "scan_end_s": float(scan_end_s), "clipped": int(n_clipped),
            "duplicate_rows": int(n_duplicates), "missing_durations": int(n_missing_durations)}


def validate_events(table: pd.DataFrame, *, source: str, n_volumes: int, repetition_time_s: float,
                    condition_column: str = "trial_type", modulators: Mapping[str, Sequence[str]] | None = None,
                    duplicate_events: DuplicatePolicy = "error",
                    missing_duration: MissingDurationPolicy = "error") -> tuple[pd.DataFrame, dict[str, Any]]:
    """Check an events table against its scan and return a clean copy.

    Parameters
    ----------
    table : DataFrame, shape (n_events, n_columns)
        Events as read by :func:`glmsteps.fileio.read_tsv` (``n/a`` is NaN).
        Needs ``onset`` and ``duration`` (seconds from the first volume), the
        condition column and every modulator column.
    source : str
        File the table came from; named in every message.
    n_volumes : int
        Number of volumes of the run's BOLD series.
    repetition_time_s : float
        Repetition time of the run in seconds.
    condition_column : str
        Column holding the condition names.
    modulators : mapping of str to sequence of str, optional
        Condition -> numeric columns kept as its parametric modulators
        (``events.modulators``). A column needs a finite value on the rows of
        the conditions it modulates only; other rows may be ``n/a``.
    duplicate_events : {"error", "keep_first", "keep_all"}
        Rows repeating an earlier row's onset, duration and condition exactly:
        an error (default), dropped (the first row is kept), or all modelled.
    missing_duration : {"error", "impulse"}
        An ``n/a`` duration: an error (default) or a 0 s impulse.

    Returns
    -------
    clean : DataFrame, shape (n_events, 3 + n_modulators)
        Columns ``onset``, ``duration`` (float64, s), ``condition`` (str),
        then the modulator columns (float64, sorted by name; NaN on rows of
        conditions they do not modulate), sorted by onset (ties keep file
        order), index reset.
    summary : dict
        See :func:`summarise_events`.

    Raises
    ------
    EventsError
        Missing column; missing, non-numeric or non-finite onset; non-numeric,
        negative or (by default) ``n/a`` duration; missing condition; onset at
        or after the end of the scan (with a hint when onsets look like
        milliseconds); missing or non-numeric modulator value on a row of a
        modulated condition; (by default) repeated rows.
    ConfigError, DataError
        Invalid settings or volume count.

    Warns
    -----
    GlmstepsWarning
        ``n/a`` durations taken as impulses and repeated rows dropped or kept
        (when the lenient options are chosen); events extending past the end
        of the scan (clipped); overlapping events of one condition.

    Notes
    -----
    The scan ends at ``scan_end_s = n_volumes * repetition_time_s``; onsets
    and durations are in seconds and ``n/a`` marks a missing value, as in the
    BIDS specification 1.9, "Task events" (from memory). Onsets look like
    milliseconds when ``max(onset) / 1000 < scan_end_s`` although most onsets
    are past the end (see :func:`looks_like_milliseconds`).
    """
    mods: Mapping[str, Sequence[str]] = {} if modulators is None else modulators
    _check_arguments(n_volumes, repetition_time_s, condition_column, mods, duplicate_events, missing_duration)
    _check_columns(table, source, condition_column, modulator_columns(mods))
    scan_end_s = float(n_volumes) * float(repetition_time_s)

    onset = _parse_onsets(table, source)
    duration, duration_missing = _parse_durations(table, source, missing_duration)
    conditions = _parse_conditions(table, source, condition_column)
    modulator_values = _parse_modulators(table, source, mods, conditions)
    pairs = find_duplicate_events(onset, duration, conditions, duration_missing)
    keep = _handle_duplicates(source, pairs, len(table), onset, duration, conditions, duplicate_events)
    _check_scan_end(onset[keep], source, scan_end_s, n_volumes, repetition_time_s, rows=np.flatnonzero(keep))

    duration, clipped = clip_durations(onset, duration, scan_end_s)
    clipped &= keep
    if clipped.any():
        rows = np.flatnonzero(clipped).tolist()
        warnings.warn(f"{source}: {len(rows)} event(s) extend past the end of the scan at {scan_end_s:g} s "
                      f"(data rows {_list_rows(rows)}, 1-based); their durations were clipped to the scan end",
                      GlmstepsWarning, stacklevel=2)

    kept = np.flatnonzero(keep)
    order = kept[np.argsort(onset[kept], kind="stable")]
    names = np.asarray(conditions, dtype=object)
    for name in sorted(set(names[kept])):
        rows = order[names[order] == name]
        overlaps = find_overlaps(onset[rows], duration[rows])
        if overlaps:
            listed = ", ".join(f"{rows[a] + 1} and {rows[b] + 1}" for a, b in overlaps[:_MAX_LISTED_ROWS])
            more = len(overlaps) - min(len(overlaps), _MAX_LISTED_ROWS)
            warnings.warn(f"{source}: condition '{name}' has overlapping events in data rows {listed}"
                          f"{f' and {more} more pairs' if more else ''} (1-based); their regressors add up where "
                          "they overlap; merge or shorten them if that is not intended",
                          GlmstepsWarning, stacklevel=2)

    clean = pd.DataFrame({"onset": onset[order], "duration": duration[order],
                          "condition": pd.Series(names[order], dtype=object)})
    for column, values in modulator_values.items():
        clean[column] = values[order]
    summary = summarise_events(clean, scan_end_s=scan_end_s, n_clipped=int(clipped.sum()), n_rows=len(table),
                               n_duplicates=len(pairs), n_missing_durations=int((duration_missing & keep).sum()))
    return clean, summary
