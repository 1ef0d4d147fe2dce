"""The repetition-time rule: each run's TR from its own files, the config as a check or a fallback.

Multi-site studies often scan at a different TR per site, so glmsteps takes the
TR of every run from that run's files and uses it in that run's design. The
one rule (``acquisition.repetition_time_s`` in the config):

1. The run's files state a TR when its BIDS JSON sidecar (the BOLD's ``.json``
   beside it) has ``RepetitionTime`` (seconds), else when the NIfTI header has
   a positive ``pixdim[4]`` with a time unit (s, ms or us in ``xyzt_units``).
   The sidecar wins over the header (BIDS keeps acquisition metadata in the
   sidecar); when both give a TR and they differ by more than 1 %, the
   sidecar's value is used and a warning names both files. A header without
   a time unit states no TR (converters often leave ``pixdim[4] = 1`` there);
   its ``pixdim[4]``, read as seconds, is still checked against a configured
   TR (rule 3).
2. ``acquisition.repetition_time_s: null`` (the default): the run's TR is the
   one its files state; a run whose files state none is an error.
3. ``acquisition.repetition_time_s: <number>``: the TR every run is expected
   to have. A run whose files state a TR more than 1 % away from it (or, with
   no sidecar TR, whose unit-less header does) is an error naming the file; a
   run whose files state none uses the number. Within 1 %, the files' stated
   value is used (the number is a check).

``SliceTiming`` (BIDS sidecar, seconds from the start of each volume) is read
and checked (finite, within [0, TR)) and recorded with the TR; the design's
frame times use ``acquisition.volume_time_fraction``, not the slice times.

References: BIDS specification 1.9, "Magnetic Resonance Imaging" (task
imaging data: ``RepetitionTime`` and ``SliceTiming`` in seconds, required /
recommended sidecar fields); NIfTI-1 header, ``pixdim[4]`` with the time unit
in ``xyzt_units`` (both from memory).

Pure module: the values read from the files in, the chosen TR out
(:func:`glmsteps.volumes.read_run_timing` reads the files).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

from .errors import ConfigError, DataError, GlmstepsWarning

#: Relative difference between two statements of a run's TR that counts as a disagreement.
TR_RELATIVE_TOLERANCE = 0.01
TimingSource = Literal["sidecar", "header", "config"]


@dataclass(frozen=True)
class RunTiming:
    """The acquisition timing of one run.

    Attributes
    ----------
    repetition_time_s : float
        The run's TR (seconds), used for its frame times.
    source : {"sidecar", "header", "config"}
        Where it came from.
    source_file : str
        The file that stated it (``""`` when it came from the config).
    slice_timing_s : tuple of float or None
        BIDS ``SliceTiming`` (seconds from the start of each volume), when given.
    configured_repetition_time_s : float or None
        ``acquisition.repetition_time_s`` as configured (None: per run from the files).
    """

    repetition_time_s: float
    source: TimingSource
    source_file: str
    slice_timing_s: tuple[float, ...] | None
    configured_repetition_time_s: float | None

    def as_record(self) -> dict[str, Any]:
        """The timing as a JSON-ready mapping (events.json / design.json ``acquisition``)."""
        return {"repetition_time_s": self.repetition_time_s, "source": self.source,
                "source_file": self.source_file,
                "slice_timing_s": None if self.slice_timing_s is None else list(self.slice_timing_s),
                "configured_repetition_time_s": self.configured_repetition_time_s}


def _differs(a: float, b: float) -> bool:
    """More than ``TR_RELATIVE_TOLERANCE`` apart, relative to ``b``."""
    return abs(a - b) > TR_RELATIVE_TOLERANCE * b


def check_configured_repetition_time(value: Any) -> float | None:
    """``acquisition.repetition_time_s`` as a float, or None (per run from the files).

    Raises
    ------
    ConfigError
        Not null and not a positive finite number.
    """
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
        raise ConfigError(f"config acquisition.repetition_time_s is {value!r}; expected a positive number of seconds, "
                          "or null to take each run's TR from its files")
    return float(value)


def check_slice_timing(slice_timing_s: Sequence[Any] | None, repetition_time_s: float,
                       source: str) -> tuple[float, ...] | None:
    """Validate BIDS ``SliceTiming`` against the run's TR.

    Parameters
    ----------
    slice_timing_s : sequence of float or None
        Acquisition time of each slice (seconds from the start of the volume).
    repetition_time_s : float
        The run's TR (seconds).
    source : str
        The sidecar (named in messages).

    Returns
    -------
    tuple of float or None

    Raises
    ------
    DataError
        Not a non-empty list of finite numbers within [0, TR) (a value at or
        beyond the TR usually means milliseconds).
    """
    if slice_timing_s is None:
        return None
    if isinstance(slice_timing_s, (str, bytes)) or not isinstance(slice_timing_s, Sequence) or not slice_timing_s:
        raise DataError(f"{source}: SliceTiming is {slice_timing_s!r}; expected a non-empty list of seconds, one per "
                        "slice; fix or remove it")
    values = []
    for k, value in enumerate(slice_timing_s):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise DataError(f"{source}: SliceTiming[{k}] is {value!r}; expected a number of seconds; fix or remove it")
        values.append(float(value))
    outside = [v for v in values if not 0.0 <= v < repetition_time_s]
    if outside:
        raise DataError(f"{source}: SliceTiming holds {outside[0]:g}, outside [0, TR = {repetition_time_s:g} s); "
                        "slice times are seconds from the start of each volume (BIDS), not milliseconds; "
                        "fix or remove SliceTiming")
    return tuple(values)


def choose_repetition_time(*, bold_path: str, sidecar_path: str | None, sidecar_tr_s: float | None,
                           header_tr_s: float | None, configured_tr_s: float | None,
                           header_unit_known: bool = True,
                           slice_timing_s: Sequence[Any] | None = None) -> RunTiming:
    """Apply the TR rule (module docstring) to what a run's files state.

    Parameters
    ----------
    bold_path : str
        The run's BOLD (named in messages).
    sidecar_path : str or None
        Its BIDS JSON sidecar, None when there is none.
    sidecar_tr_s : float or None
        The sidecar's ``RepetitionTime`` (seconds), None when absent.
    header_tr_s : float or None
        The header's ``pixdim[4]`` in seconds (read as seconds when the header
        gives no unit), None when it is not positive.
    configured_tr_s : float or None
        ``acquisition.repetition_time_s`` (None: per run from the files).
    header_unit_known : bool
        The header gives a time unit; without one its TR is only checked.
    slice_timing_s : sequence of float, optional
        The sidecar's ``SliceTiming``.

    Returns
    -------
    RunTiming

    Raises
    ------
    DataError
        The files state no TR and none is configured; a stated TR differs from
        the configured one by more than 1 %; bad ``SliceTiming``.
    ConfigError
        ``configured_tr_s`` is not null or a positive number.

    Warns
    -----
    GlmstepsWarning
        Sidecar and header disagree by more than 1 % (the sidecar is used).
    """
    configured = check_configured_repetition_time(configured_tr_s)
    side = sidecar_path or ""
    stated: tuple[float, TimingSource, str] | None = None
    if sidecar_tr_s is not None:
        stated = (float(sidecar_tr_s), "sidecar", side)
        if header_tr_s is not None and _differs(header_tr_s, sidecar_tr_s):
            warnings.warn(f"{bold_path}: header TR (pixdim[4]) {header_tr_s:g} s differs from RepetitionTime "
                          f"{sidecar_tr_s:g} s of its BIDS sidecar {side} by more than 1 %; the sidecar's value is "
                          "used", GlmstepsWarning, stacklevel=2)
    elif header_tr_s is not None and header_unit_known:
        stated = (float(header_tr_s), "header", bold_path)
    elif header_tr_s is not None and configured is not None and _differs(header_tr_s, configured):
        raise DataError(f"{bold_path}: header TR (pixdim[4]) {header_tr_s:g} s differs from the configured "
                        f"repetition_time_s {configured:g} s (acquisition.repetition_time_s) by more than 1 % (the "
                        "header gives no time unit; read as seconds); add the right RepetitionTime to its BIDS "
                        "sidecar, or correct acquisition.repetition_time_s")

    if stated is None:
        if configured is None:
            where = f"its BIDS sidecar {side} has no RepetitionTime" if side else "it has no BIDS sidecar (.json)"
            header = ("has pixdim[4] but no time unit" if header_tr_s is not None else "states none")
            raise DataError(f"{bold_path}: no repetition time: {where} and the NIfTI header {header}; add "
                            "RepetitionTime (seconds) to the BIDS sidecar or set acquisition.repetition_time_s")
        tr, source, source_file = configured, "config", ""
    else:
        tr, source, source_file = stated
        if configured is not None and _differs(tr, configured):
            what = "RepetitionTime" if source == "sidecar" else "header TR (pixdim[4])"
            fix = ("correct the sidecar" if source == "sidecar" else
                   "add the right RepetitionTime to its BIDS sidecar (it takes precedence over the header)")
            raise DataError(f"{source_file}: {what} {tr:g} s differs from the configured repetition_time_s "
                            f"{configured:g} s (acquisition.repetition_time_s) by more than 1 %; set "
                            f"acquisition.repetition_time_s to null to use each run's own TR, or {fix}")
    return RunTiming(repetition_time_s=tr, source=source, source_file=source_file,
                     slice_timing_s=check_slice_timing(slice_timing_s, tr, side or bold_path),
                     configured_repetition_time_s=configured)
