"""Step `index`: list every statistical map of the study in ``index.tsv``; mark the output folder as a
BIDS derivative dataset (``dataset_description.json``)."""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import pandas as pd

from .. import __version__
from ..bids import derivative_description
from ..errors import ProvenanceError
from ..fileio import write_json, write_tsv
from ..provenance import build_record, read_record, sidecar_path, write_sidecar

#: Columns of index.tsv, in order.
INDEX_COLUMNS: tuple[str, ...] = ("level", "subject", "session", "task", "run", "contrast", "stat", "path",
                                  "status", "params_hash", "lineage_hash")


def index_rows(map_paths: Sequence[str], relative_to: str | os.PathLike[str]) -> pd.DataFrame:
    """One row per map from its sidecar.

    Parameters
    ----------
    map_paths : sequence of str
        Statistical maps (each with a JSON sidecar carrying a ``map`` block).
    relative_to : path-like
        Folder the ``path`` column is relative to (the output folder).

    Returns
    -------
    DataFrame with :data:`INDEX_COLUMNS`; ``status`` is ``ok``, ``excluded``
    (run excluded upstream, e.g. too many censored volumes) or ``skipped``
    (contrast not estimable in that run).
    """
    rows: list[dict[str, Any]] = []
    for path in map_paths:
        record = read_record(path)
        if record is None or "map" not in record:
            raise ProvenanceError(f"{sidecar_path(path)}: missing or lacks a 'map' block; rerun the step that wrote {path}")
        entities = record["map"]
        status = "excluded" if record.get("excluded") else "skipped" if record.get("skipped") else "ok"
        rows.append({
            **{k: entities.get(k, "") or "" for k in ("level", "subject", "session", "task", "run", "contrast", "stat")},
            "path": os.path.relpath(path, relative_to), "status": status,
            "params_hash": record["params_hash"], "lineage_hash": record["lineage_hash"],
        })
    table = pd.DataFrame(rows, columns=list(INDEX_COLUMNS))
    return table.sort_values(["level", "subject", "session", "task", "run", "contrast", "stat"], kind="stable")


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Write ``index.tsv`` (inputs: ``maps``; outputs: ``index`` and, when the rule names it,
    ``description``: the output folder's ``dataset_description.json``)."""
    maps = list(inputs["maps"])
    out_dir = Path(outputs["index"]).parent
    table = index_rows(maps, out_dir)
    # the index depends on the maps' sidecars (not their voxels): record their lineage only
    record = build_record("index", dict(params), {}, n_maps=len(table),
                          map_lineage_hashes=sorted(set(table["lineage_hash"])))
    write_sidecar(outputs["index"], record)
    write_tsv(outputs["index"], table)
    if outputs.get("description"):
        write_json(outputs["description"], derivative_description(__version__))
