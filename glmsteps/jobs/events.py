"""Step ``validate_events``: check a run's events file against its BOLD series.

Inputs ``events`` (TSV) and ``bold`` (NIfTI, header only: volume count);
params ``condition_column``, ``modulators``, ``repetition_time_s``; outputs
``events`` (clean TSV) and ``summary`` (JSON: the events summary, the
warnings and the provenance record). ``events.tsv``'s sidecar is
``events.json``, the summary itself, so the summary is written first.
"""

from __future__ import annotations

import math
import os
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pandas as pd

from ..errors import ConfigError, DataError, EventsError, GlmstepsWarning
from ..events import validate_events
from ..fileio import read_user_tsv, read_tsv, write_json, write_tsv
from ..provenance import build_record, collect_warnings, sidecar_path, write_sidecar

STEP = "validate_events"
#: The params this step needs, exactly.
PARAM_KEYS: tuple[str, ...] = ("condition_column", "modulators", "repetition_time_s")
#: Relative difference between configured and header TR that triggers a warning.
TR_TOLERANCE = 0.01


def read_bold_header(path: str | os.PathLike[str]) -> tuple[int, float | None]:
    """Volume count and header repetition time (s) of a 4D NIfTI, reading the header only.

    Parameters
    ----------
    path : path-like
        BOLD series (.nii or .nii.gz).

    Returns
    -------
    n_volumes : int
        Length of the 4th axis.
    header_tr_s : float or None
        The 4th voxel size converted to seconds, or None when the header
        gives no usable time unit.

    Raises
    ------
    DataError
        The file cannot be read as NIfTI or is not 4D.
    """
    import nibabel as nib

    try:
        img = nib.load(os.fspath(path))
    except Exception as exc:  # nibabel raises many types for unreadable files
        raise DataError(f"{path}: cannot read as NIfTI ({exc}); check the file is a valid .nii/.nii.gz") from exc
    shape = tuple(int(s) for s in img.shape)
    if len(shape) != 4:
        raise DataError(f"{path}: expected a 4D BOLD series (x, y, z, volumes), found shape {shape}; "
                        "pass the run's 4D image")
    header_tr_s = None
    try:
        zoom = float(img.header.get_zooms()[3])
        unit = img.header.get_xyzt_units()[1]
        factor = {"sec": 1.0, "msec": 1e-3, "usec": 1e-6}.get(unit)
        if factor is not None and math.isfinite(zoom) and zoom > 0:
            header_tr_s = zoom * factor
    except (AttributeError, IndexError, TypeError, ValueError):
        header_tr_s = None
    return shape[3], header_tr_s


def _check_params(params: Mapping[str, Any]) -> None:
    missing = [k for k in PARAM_KEYS if k not in params]
    if missing:
        raise ConfigError(f"step {STEP}: params lack {missing}; the rule must pass exactly {list(PARAM_KEYS)}")
    unknown = sorted(set(params) - set(PARAM_KEYS))
    if unknown:
        raise ConfigError(f"step {STEP}: unknown params {unknown}; the rule must pass exactly {list(PARAM_KEYS)}")
    if params["modulators"] is None or isinstance(params["modulators"], str) or \
            not isinstance(params["modulators"], (list, tuple)):
        raise ConfigError(f"config modulators is {params['modulators']!r}; expected a list of column names "
                          "([] for none)")


def _read_events(path: str) -> pd.DataFrame:
    return read_user_tsv(path, EventsError, "save it as a BIDS events TSV")


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Validate one run's events and write the clean table and its summary.

    Parameters
    ----------
    inputs : mapping
        ``events`` (TSV path) and ``bold`` (NIfTI path).
    outputs : mapping
        ``events`` (clean TSV) and ``summary`` (JSON).
    params : mapping
        ``condition_column`` (str), ``modulators`` (list of str),
        ``repetition_time_s`` (float, s).
    wildcards : mapping
        Unused (the run's entities).
    threads : int
        Unused.

    Raises
    ------
    EventsError, DataError, ConfigError
        Before anything is written.
    """
    _check_params(params)
    events_path, bold_path = str(inputs["events"]), str(inputs["bold"])
    n_volumes, header_tr_s = read_bold_header(bold_path)
    table = _read_events(events_path)
    tr = params["repetition_time_s"]
    with collect_warnings() as seen:
        clean, summary = validate_events(table, source=events_path, n_volumes=n_volumes, repetition_time_s=tr,
                                         condition_column=params["condition_column"],
                                         modulator_columns=list(params["modulators"]))
        if header_tr_s is not None and abs(header_tr_s - float(tr)) > TR_TOLERANCE * float(tr):
            warnings.warn(f"{bold_path}: header repetition time is {header_tr_s:g} s but repetition_time_s is "
                          f"{float(tr):g} s; the configured value is used; check which one is right",
                          GlmstepsWarning, stacklevel=2)
    record = build_record(STEP, params, {"events": events_path, "bold": bold_path}, seen)
    summary_path = Path(outputs["summary"])
    write_json(summary_path, {**summary, "n_volumes": n_volumes, "warnings": list(seen), "provenance": record})
    if sidecar_path(outputs["events"]).resolve() != summary_path.resolve():
        write_sidecar(outputs["events"], record)
    write_tsv(outputs["events"], clean)
