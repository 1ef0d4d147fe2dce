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
from ..volumes import read_bold_header

STEP = "select_confounds"
#: Params this step requires.
PARAM_KEYS: tuple[str, ...] = ("columns", "derivatives", "squares", "demean", "scale", "censor",
                               "drop_initial_volumes", "max_censored_fraction")
#: Params it also accepts.
OPTIONAL_KEYS: tuple[str, ...] = ("derivative_columns",)
#: Keys of the ``censor`` block.
CENSOR_KEYS: tuple[str, ...] = ("column", "threshold", "volumes_before", "volumes_after")


def _check_params(params: Mapping[str, Any]) -> None:
    missing = [k for k in PARAM_KEYS if k not in params]
    if missing:
        raise ConfigError(f"step {STEP}: params lack {missing}; pass the confounds config section "
                          f"with keys {list(PARAM_KEYS)}")
    unknown = sorted(set(params) - set(PARAM_KEYS) - set(OPTIONAL_KEYS))
    if unknown:
        raise ConfigError(f"config confounds: unknown key(s) {unknown}; allowed: "
                          f"{list(PARAM_KEYS) + list(OPTIONAL_KEYS)}")
    censor = params["censor"]
    if censor is None:
        return
    if not isinstance(censor, Mapping):
        raise ConfigError(f"config confounds.censor is {censor!r}; expected null or a mapping with keys "
                          f"{list(CENSOR_KEYS)}")
    keys = set(censor)
    if keys != set(CENSOR_KEYS):
        raise ConfigError(f"config confounds.censor has keys {sorted(keys)}; expected exactly {list(CENSOR_KEYS)}")


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
        The ``confounds`` config section (see module docstring); ``censor``
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
    _check_params(params)
    if "bold" not in inputs:
        raise ConfigError(f"step {STEP}: input 'bold' is missing; the rule must name the inputs confounds and bold")
    source, bold_path = str(inputs["confounds"]), str(inputs["bold"])
    n_volumes = read_bold_header(bold_path).shape[3]
    table = _read_confounds(source)
    check_row_count(table, n_volumes, source=source, bold=bold_path)
    censor = params["censor"] or {}
    derivative_columns = list(params.get("derivative_columns") or [])
    with collect_warnings() as seen:
        result = prepare_confounds(
            table, source=source, columns=params["columns"], derivatives=params["derivatives"],
            squares=params["squares"], demean=params["demean"], scale=params["scale"],
            censor_column=censor.get("column"), censor_threshold=censor.get("threshold"),
            volumes_before=censor.get("volumes_before", 0), volumes_after=censor.get("volumes_after", 0),
            drop_initial_volumes=params["drop_initial_volumes"],
            max_censored_fraction=params["max_censored_fraction"], derivative_columns=derivative_columns)
    record = build_record(STEP, params, {"confounds": source, "bold": bold_path}, seen)

    traces = clean_confound_values(table[list(result.selected_columns)], source=source,
                                   derivative_columns=derivative_columns)
    censor_values = censor_defined = None
    if censor:
        censor_values = clean_confound_values(table[[censor["column"]]], source=source,
                                              derivative_columns=[censor["column"]])[censor["column"]].to_numpy()
        censor_defined = table[censor["column"]].notna().to_numpy()
    motion = motion_summary(traces, n_dropped=result.n_dropped, censor_values=censor_values,
                            censor_column=censor.get("column"), censor_defined=censor_defined,
                            censor_threshold=censor.get("threshold"))
    title = run_label(wildcards) or Path(source).name
    fig = plot_confounds(traces, censored=result.censored, n_dropped=result.n_dropped, censor_values=censor_values,
                         censor_name=str(censor.get("column", "")), censor_threshold=censor.get("threshold"),
                         title=title)

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
