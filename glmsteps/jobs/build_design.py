"""Step ``build_design``: the design matrix of one run, its diagnostics and figures.

Inputs
    ``events`` (clean events TSV: onset, duration, condition, modulator columns),
    ``events_summary`` (``events.json``: the run's ``repetition_time_s``, chosen
    by the validate_events step, its ``acquisition`` timing and ``n_volumes``),
    ``confounds`` (TSV, one row per acquired volume: selected confound and
    ``spike_*`` columns), ``confounds_summary`` (JSON with ``n_volumes``,
    ``drop_initial_volumes``, ``excluded``).
Params
    ``hrf``, ``fir_bins``, ``fir_bin_width_s``, ``time_resolution_s``,
    ``drift_basis``, ``cutoff_s``, ``legendre_order``,
    ``volume_time_fraction``, ``conditions`` (list, may be empty), ``modulators``
    (mapping condition -> list of columns). The TR is not a param: it is the
    run's own, from ``events_summary``.
Outputs
    ``design`` (TSV, one column per regressor, one row per kept volume),
    ``summary`` (JSON, the sidecar of ``design`` and ``figure``),
    ``figure`` (PNG, the matrix), ``correlation_figure`` (PNG, with its own
    sidecar).

The first ``drop_initial_volumes`` volumes are not modelled: the design's rows
start at that volume, but frame times stay absolute (seconds from the start
of volume 0), so events before it still convolve into the kept rows.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .. import provenance
from ..bids import run_label
from ..design import build_design, design_diagnostics, frame_times
from ..errors import ConfigError, DesignError
from ..fileio import read_json, read_tsv, write_json, write_tsv
from ..plots.design import plot_correlation_matrix, draw_design_matrix
from ..settings import DesignSettings

STEP = "build_design"
INPUT_KEYS: tuple[str, ...] = ("events", "events_summary", "confounds", "confounds_summary")
OUTPUT_KEYS: tuple[str, ...] = ("design", "summary", "figure", "correlation_figure")


def read_confounds_summary(path: str | os.PathLike[str]) -> tuple[int, int, bool]:
    """``n_volumes``, ``drop_initial_volumes`` and ``excluded`` from the confounds summary."""
    try:
        data = read_json(path)
    except (OSError, json.JSONDecodeError) as exc:
        raise DesignError(f"{path}: cannot read the confounds summary ({exc}); rerun select_confounds") from exc
    if not isinstance(data, dict):
        raise DesignError(f"{path}: expected a JSON object, found {type(data).__name__}; rerun select_confounds")
    for key in ("n_volumes", "drop_initial_volumes", "excluded"):
        if key not in data:
            raise DesignError(f"{path}: key {key!r} is missing; expected n_volumes, drop_initial_volumes and "
                              "excluded; rerun select_confounds")
    n, drop, excluded = data["n_volumes"], data["drop_initial_volumes"], data["excluded"]
    for key, value in (("n_volumes", n), ("drop_initial_volumes", drop)):
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise DesignError(f"{path}: {key}={value!r}, expected a whole number >= 0; rerun select_confounds")
    if drop >= n - 1:
        raise DesignError(f"{path}: drop_initial_volumes={drop} leaves fewer than 2 of the {n} volumes; "
                          "lower confounds.drop_initial_volumes")
    if not isinstance(excluded, bool):
        raise DesignError(f"{path}: excluded={excluded!r}, expected true or false; rerun select_confounds")
    return n, drop, excluded


def read_events_summary(path: str | os.PathLike[str]) -> tuple[float, int, dict[str, Any]]:
    """The run's ``repetition_time_s``, ``n_volumes`` and ``acquisition`` record from ``events.json``.

    Raises
    ------
    DesignError
        Unreadable summary or a missing / invalid key.
    """
    try:
        data = read_json(path)
    except (OSError, json.JSONDecodeError) as exc:
        raise DesignError(f"{path}: cannot read the events summary ({exc}); rerun validate_events") from exc
    if not isinstance(data, dict) or not all(k in data for k in ("repetition_time_s", "n_volumes", "acquisition")):
        raise DesignError(f"{path}: expected a JSON object with repetition_time_s, n_volumes and acquisition; "
                          "rerun validate_events")
    tr, n = data["repetition_time_s"], data["n_volumes"]
    if isinstance(tr, bool) or not isinstance(tr, (int, float)) or not np.isfinite(tr) or tr <= 0:
        raise DesignError(f"{path}: repetition_time_s={tr!r}, expected a positive number of seconds; "
                          "rerun validate_events")
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise DesignError(f"{path}: n_volumes={n!r}, expected a whole number >= 1; rerun validate_events")
    return float(tr), n, dict(data["acquisition"])


def read_confounds(path: str | os.PathLike[str], n_volumes: int) -> pd.DataFrame:
    """Read the selected confounds and check there is one row per acquired volume."""
    table = read_tsv(path)
    if table.shape[1] == 0:  # no confound selected and no censoring: a table of no columns
        table = pd.DataFrame(index=range(n_volumes))
    if len(table) != n_volumes:
        raise DesignError(f"{path}: {len(table)} rows, expected one per volume ({n_volumes}); "
                          "rerun select_confounds on this run")
    return table  # values are checked by build_design, the entry point of the maths


def read_events(path: str | os.PathLike[str]) -> pd.DataFrame:
    """Read the clean events table and check its required columns."""
    try:
        table = read_tsv(path)
    except pd.errors.EmptyDataError:
        raise DesignError(f"{path}: the events file is empty; expected a header onset, duration, condition") from None
    missing = [c for c in ("onset", "duration", "condition") if c not in table.columns]
    if missing:
        raise DesignError(f"{path}: columns {missing} are missing (found {list(table.columns)}); "
                          "rerun validate_events")
    for col in ("onset", "duration"):
        values = pd.to_numeric(table[col], errors="coerce").to_numpy(dtype=np.float64)
        bad = np.nonzero(~np.isfinite(values))[0]
        if bad.size:
            raise DesignError(f"{path}: row {bad[0] + 1} {col} is {table[col].iloc[bad[0]]!r}, expected a number; "
                              "rerun validate_events")
    table["condition"] = table["condition"].astype(str)
    return table


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Build, check and write the design of one run (see the module docstring)."""
    for group, keys, given in (("input", INPUT_KEYS, inputs), ("output", OUTPUT_KEYS, outputs)):
        missing = [k for k in keys if k not in given]
        if missing:
            raise ConfigError(f"{STEP}: named {group}(s) {missing} are missing; the rule must name {list(keys)}")
    settings = DesignSettings.from_params(params)
    n_total, drop, excluded = read_confounds_summary(inputs["confounds_summary"])
    tr_s, n_bold, acquisition = read_events_summary(inputs["events_summary"])
    if n_bold != n_total:
        raise DesignError(f"{inputs['events_summary']}: the BOLD has {n_bold} volumes but "
                          f"{inputs['confounds_summary']} counts {n_total}; rerun validate_events and "
                          "select_confounds on this run")
    events = read_events(inputs["events"])
    confounds = read_confounds(inputs["confounds"], n_total).iloc[drop:].reset_index(drop=True)
    n_kept = n_total - drop
    times = frame_times(n_kept, tr_s, settings.volume_time_fraction, first_volume=drop)

    with provenance.collect_warnings() as seen:
        try:
            design = build_design(events, times, confounds=confounds, **settings.design_options())
            diagnostics = design_diagnostics(design, allow_rank_deficient=excluded)
        except DesignError as exc:
            raise DesignError(f"{inputs['events']} with {inputs['confounds']}: {exc}") from None
    record = provenance.build_record(STEP, params, {k: inputs[k] for k in INPUT_KEYS}, warnings_seen=seen,
                                     excluded=excluded)
    summary = {
        "names": list(design.names), "roles": list(design.roles), "conditions": list(design.conditions),
        "basis": list(design.basis), "first_volume": drop, "n_volumes": n_kept, "n_volumes_acquired": n_total,
        "repetition_time_s": tr_s, "acquisition": acquisition, "frame_times_s": design.frame_times_s.tolist(), "diagnostics": diagnostics, "excluded": excluded,
        "warnings": list(seen), "provenance": record,
    }
    title = run_label(wildcards) or "design matrix"
    corr = np.array([[np.nan if v is None else v for v in row] for row in diagnostics["correlation"]["values"]],
                    dtype=np.float64).reshape(len(design.names), len(design.names))

    write_json(outputs["summary"], summary)
    for out in (outputs["design"], outputs["figure"]):
        if provenance.sidecar_path(out).resolve() != Path(outputs["summary"]).resolve():
            provenance.write_sidecar(out, summary)
    provenance.write_sidecar(outputs["correlation_figure"], record, excluded=excluded,
                             names=list(design.names), content="regressor correlation matrix of the design")
    plot_correlation_matrix(design.names, corr, outputs["correlation_figure"], title=f"correlations {title}")
    draw_design_matrix(design.X, design.names, design.roles, outputs["figure"], title=title, first_volume=drop)
    write_tsv(outputs["design"], design.to_frame())
