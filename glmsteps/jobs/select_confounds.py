"""Step ``select_confounds``: nuisance regressors and censoring of one run.

Inputs ``confounds`` (TSV, one row per volume) and ``bold`` (NIfTI, header
only: its volume count must equal the table's rows); params: the
``confounds`` config section (``columns``, ``derivatives``, ``squares``,
``demean``, ``scale``, ``censor``, ``drop_initial_volumes``,
``max_censored_fraction``, ``derivative_columns``); outputs ``confounds``
(TSV, every volume), ``summary`` (JSON, with a head-motion summary) and
``figure`` (PNG). The TSV's and the PNG's sidecar is ``confounds.json``, the
summary itself, so it is written first.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pandas as pd

from ..bids import run_label
from ..confounds import check_row_count, clean_confound_values, motion_summary, prepare_confounds
from ..errors import ConfigError, ConfoundsError
from ..fileio import read_user_tsv, write_json, write_tsv
from ..plots.confounds import plot_confounds
from ..plots.style import save_figure
from ..provenance import build_record, collect_warnings, sidecar_path, write_sidecar
from ..settings import ConfoundsSettings
from ..volumes import read_bold_header

STEP = "select_confounds"


def _read_confounds(path: str) -> pd.DataFrame:
    return read_user_tsv(path, ConfoundsError, "save it as a TSV with one row per volume")


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Select and expand confounds, censor volumes, and write table, summary and figure.

    Parameters
    ----------
    inputs : mapping
        ``confounds`` (TSV path), ``bold`` (NIfTI path; header only).
    outputs : mapping
        ``confounds`` (TSV), ``summary`` (JSON), ``figure`` (PNG).
    params : mapping
        The ``confounds`` config section (:class:`glmsteps.settings.ConfoundsSettings`); ``censor``
        is null or ``{column, threshold, volumes_before, volumes_after}``.
    wildcards : mapping
        The run's entities (used in the figure title).
    threads : int
        Unused.

    Raises
    ------
    ConfoundsError, ConfigError
        Before anything is written.
    """
    settings = ConfoundsSettings.from_params(params)
    if "bold" not in inputs:
        raise ConfigError(f"step {STEP}: input 'bold' is missing; the rule must name the inputs confounds and bold")
    source, bold_path = str(inputs["confounds"]), str(inputs["bold"])
    n_volumes = read_bold_header(bold_path).shape[3]
    table = _read_confounds(source)
    check_row_count(table, n_volumes, source=source, bold=bold_path)
    censor = settings.censor
    derivative_columns = settings.derivative_columns
    with collect_warnings() as seen:
        result = prepare_confounds(
            table, source=source, columns=settings.columns, derivatives=settings.derivatives,
            squares=settings.squares, demean=settings.demean, scale=settings.scale,
            censor_column=censor.column if censor else None, censor_threshold=censor.threshold if censor else None,
            volumes_before=censor.volumes_before if censor else 0, volumes_after=censor.volumes_after if censor else 0,
            drop_initial_volumes=settings.drop_initial_volumes,
            max_censored_fraction=settings.max_censored_fraction, derivative_columns=derivative_columns)
    record = build_record(STEP, params, {"confounds": source, "bold": bold_path}, seen)

    traces = clean_confound_values(table[list(result.selected_columns)], source=source,
                                   derivative_columns=derivative_columns)
    censor_values = censor_defined = None
    if censor:
        censor_values = clean_confound_values(table[[censor.column]], source=source,
                                              derivative_columns=[censor.column])[censor.column].to_numpy()
        censor_defined = table[censor.column].notna().to_numpy()
    motion = motion_summary(traces, n_dropped=result.n_dropped, censor_values=censor_values,
                            censor_column=censor.column if censor else None, censor_defined=censor_defined,
                            censor_threshold=censor.threshold if censor else None)
    title = run_label(wildcards) or Path(source).name
    fig = plot_confounds(traces, censored=result.censored, n_dropped=result.n_dropped, censor_values=censor_values,
                         censor_name=censor.column if censor else "",
                         censor_threshold=censor.threshold if censor else None, title=title)

    summary = {
        "n_volumes": int(len(table)),
        "columns": [str(c) for c in result.regressors.columns],
        "censored_volumes": [int(i) for i in result.censored.nonzero()[0]],
        "censored_fraction": float(result.censored_fraction),
        "drop_initial_volumes": int(result.n_dropped),
        "excluded": bool(result.excluded),
        "exclusion_reason": result.exclusion_reason,
        "motion": motion,
        "warnings": list(seen),
        "provenance": record,
    }
    write_json(outputs["summary"], summary)
    for key in ("confounds", "figure"):
        if sidecar_path(outputs[key]).resolve() != Path(outputs["summary"]).resolve():
            write_sidecar(outputs[key], record)
    write_tsv(outputs["confounds"], result.regressors)
    save_figure(fig, outputs["figure"])
