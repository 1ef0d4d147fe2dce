"""Step ``validate_events``: check a run's events file against its BOLD series.

Inputs ``events`` (TSV), ``bold`` (NIfTI, header only: volume count and
``pixdim[4]``) and, when the run has one, ``bold_sidecar`` (the BOLD's BIDS
JSON sidecar: ``RepetitionTime``, ``SliceTiming``); params
``condition_column``, ``modulators`` (condition -> columns),
``repetition_time_s`` (null or the expected TR), ``duplicate_events``,
``missing_duration``; outputs ``events`` (clean TSV) and ``summary`` (JSON:
the events summary, the run's ``repetition_time_s`` and ``acquisition``
timing, the warnings and the provenance record). ``events.tsv``'s sidecar is
``events.json``, the summary itself, so the summary is written first.

The run's TR is chosen here, once, by the rule of :mod:`glmsteps.acquisition`;
the design step reads it from ``events.json``.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pandas as pd

from ..errors import EventsError
from ..events import validate_events
from ..fileio import read_user_tsv, write_json, write_tsv
from ..provenance import build_record, collect_warnings, display_path, sidecar_path, write_sidecar
from ..settings import EventsSettings
from ..volumes import bids_sidecar_of, read_bold_header, read_run_timing

STEP = "validate_events"


def _read_events(path: str) -> pd.DataFrame:
    return read_user_tsv(path, EventsError, "save it as a BIDS events TSV")


def bold_sidecar(inputs: Mapping[str, Any], bold_path: str) -> str | None:
    """The run's BIDS sidecar: the ``bold_sidecar`` input (a path, or an empty list when the run has none);
    without that input, the ``.json`` beside the BOLD if it exists."""
    if "bold_sidecar" in inputs:
        given = inputs["bold_sidecar"]
        if isinstance(given, (list, tuple)):
            return str(given[0]) if given else None
        return str(given) if given else None
    side = bids_sidecar_of(bold_path)
    return str(side) if side.exists() else None


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Validate one run's events and write the clean table and its summary.

    Parameters
    ----------
    inputs : mapping
        ``events`` (TSV path), ``bold`` (NIfTI path), optional ``bold_sidecar``.
    outputs : mapping
        ``events`` (clean TSV) and ``summary`` (JSON).
    params : mapping
        See the module docstring (:class:`glmsteps.settings.EventsSettings`).
    wildcards : mapping
        Unused (the run's entities).
    threads : int
        Unused.

    Raises
    ------
    EventsError, DataError, ConfigError
        Before anything is written.
    """
    settings = EventsSettings.from_params(params)
    events_path, bold_path = str(inputs["events"]), str(inputs["bold"])
    side = bold_sidecar(inputs, bold_path)
    bold = read_bold_header(bold_path)
    table = _read_events(events_path)
    with collect_warnings() as seen:
        timing = read_run_timing(bold, side, settings.repetition_time_s)
        clean, summary = validate_events(table, source=events_path, n_volumes=bold.shape[3],
                                         repetition_time_s=timing.repetition_time_s,
                                         condition_column=settings.condition_column,
                                         modulators=settings.modulators,
                                         duplicate_events=settings.duplicate_events,
                                         missing_duration=settings.missing_duration)
    read = {"events": events_path, "bold": bold_path, **({"bold_sidecar": side} if side else {})}
    record = build_record(STEP, params, read, seen)
    summary_path = Path(outputs["summary"])
    acquisition = timing.as_record()
    if acquisition["source_file"]:
        acquisition["source_file"] = display_path(acquisition["source_file"])  # as paths are in the record
    write_json(summary_path, {**summary, "n_volumes": bold.shape[3], "repetition_time_s": timing.repetition_time_s,
                              "acquisition": acquisition, "warnings": list(seen), "provenance": record})
    if sidecar_path(outputs["events"]).resolve() != summary_path.resolve():
        write_sidecar(outputs["events"], record)
    write_tsv(outputs["events"], clean)
