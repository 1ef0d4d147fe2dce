"""Pure assembly of the report's tables (records and DataFrames in, :class:`Table` out).

Column lookups are tolerant: a cluster table may name its peak coordinates,
size and FWE p in several ways (the formats of the threshold and permutation
steps differ, and may change), so columns are found by patterns, not names.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import pandas as pd

from .model import FileLink, Table

#: Patterns (regular expressions, matched against lower-case column names) of a cluster table's columns.
CLUSTER_COLUMN_PATTERNS: dict[str, tuple[str, ...]] = {
    "cluster": (r"^cluster(_id|_index|_number)?$", r"^id$", r"^label$"),
    "x_mm": (r"^peak_x(_mm)?$", r"^x_mm$", r"^peak.*\bx\b.*mm", r"^x$"),
    "y_mm": (r"^peak_y(_mm)?$", r"^y_mm$", r"^peak.*\by\b.*mm", r"^y$"),
    "z_mm": (r"^peak_z(_mm)?$", r"^z_mm$", r"^peak.*\bz\b.*mm", r"^z$"),
    "size_voxels": (r"^size(_voxels)?$", r"^n_voxels$", r"^(n_)?voxels$", r"^extent(_voxels)?$"),
    "volume_mm3": (r"^volume(_mm3)?$", r"^size_mm3$"),
    "peak": (r"^peak_(stat|z|t|f|value)$", r"^peak$", r"^max_(z|t|stat)$"),
    "p_fwe": (r"^p_fwe(_extent|_cluster)?$", r"^cluster_p_fwe$", r"^p_fwe_.*extent", r"^fwe_p$", r"^p_cluster_fwe$"),
    "p_fwe_mass": (r"^p_fwe_mass$",),
}

#: Header of each cluster column shown.
CLUSTER_HEADERS: dict[str, str] = {
    "cluster": "cluster", "x_mm": "peak x (mm)", "y_mm": "peak y (mm)", "z_mm": "peak z (mm)",
    "size_voxels": "size (voxels)", "volume_mm3": "volume (mm\u00b3)", "peak": "peak", "p_fwe": "FWE p (extent)",
    "p_fwe_mass": "FWE p (mass)",
}


def find_column(columns: Iterable[str], patterns: Sequence[str]) -> str | None:
    """The first column matching the first pattern that matches any column.

    Examples
    --------
    >>> find_column(["cluster", "n_voxels", "peak_x_mm"], (r"^size(_voxels)?$", r"^n_voxels$"))
    'n_voxels'
    >>> find_column(["a"], (r"^b$",)) is None
    True
    """
    names = list(columns)
    for pattern in patterns:
        rx = re.compile(pattern)
        for name in names:
            if rx.search(str(name).lower()):
                return name
    return None


def format_number(value: Any, digits: int = 3) -> str:
    """A number to ``digits`` significant digits (no exponent for ordinary sizes); ``n/a`` if missing.

    Examples
    --------
    >>> format_number(6.7057204), format_number(0.0014386), format_number(12345.6), format_number(float("nan"))
    ('6.71', '0.00144', '12346', 'n/a')
    >>> format_number(4), format_number(4.0)
    ('4', '4.00')
    """
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int) or (hasattr(value, "dtype") and getattr(value.dtype, "kind", "") in "iu"):
        return str(int(value))
    try:
        x = float(value)
    except (TypeError, ValueError):
        return "n/a" if value is None or value == "" else str(value)
    if not math.isfinite(x):
        return "n/a"
    if x == 0:
        return "0"
    magnitude = math.floor(math.log10(abs(x)))
    if magnitude >= digits - 1:
        return f"{x:.0f}"
    if magnitude < -4:
        return f"{x:.{digits - 1}e}"
    return f"{x:.{digits - 1 - magnitude}f}"


def format_mm(value: Any) -> str:
    """A coordinate in mm to 0.1 mm (``n/a`` if missing)."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        return "n/a"
    return f"{x:.1f}" if math.isfinite(x) else "n/a"


def format_int(value: Any) -> str:
    """A count (``n/a`` if missing)."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        return "n/a"
    return str(int(round(x))) if math.isfinite(x) else "n/a"


def cluster_table(frame: pd.DataFrame, caption: str, source: FileLink | None = None, max_rows: int = 25) -> Table:
    """A cluster table with the columns the report shows, found by :data:`CLUSTER_COLUMN_PATTERNS`.

    Parameters
    ----------
    frame : DataFrame
        A cluster table (one row per cluster, largest first).
    caption : str
    source : FileLink, optional
        The TSV.
    max_rows : int
        Rows shown (the caption says how many more the file has).

    Returns
    -------
    Table
        Coordinates to 0.1 mm, statistics and p to 3 significant digits;
        columns the table lacks are left out.
    """
    found = {key: find_column(frame.columns, patterns) for key, patterns in CLUSTER_COLUMN_PATTERNS.items()}
    shown = [key for key, col in found.items() if col is not None]
    headers = dict(CLUSTER_HEADERS)
    if found["peak"] is not None:
        stat = str(found["peak"]).lower().split("_", 1)[-1]
        headers["peak"] = "peak statistic" if stat in ("stat", "value") else f"peak {stat}"
    rows = []
    for _, row in frame.head(max_rows).iterrows():
        cells = []
        for key in shown:
            value = row[found[key]]
            if key in ("x_mm", "y_mm", "z_mm"):
                cells.append(format_mm(value))
            elif key in ("cluster", "size_voxels"):
                cells.append(format_int(value))
            else:
                cells.append(format_number(value))
        rows.append(tuple(cells))
    more = len(frame) - min(len(frame), max_rows)
    text = caption + (f" ({more} smaller cluster(s) in the file)" if more > 0 else "")
    if not len(frame):
        text = caption + " (no cluster)"
    return Table(columns=tuple(headers[k] for k in shown), rows=tuple(rows), caption=text, source=source)


def site_table(sites: Mapping[str, Any], source: FileLink | None = None) -> Table | None:
    """Per-site summaries before (and after) harmonisation, from a ``site_qc.json`` ``sites`` block.

    Parameters
    ----------
    sites : mapping
        ``as_entered`` (and optionally ``harmonised``): lists of per-site records.
    source : FileLink, optional

    Returns
    -------
    Table or None
        One row per site and version; every numeric field of the records, to
        3 significant digits. None when the block has no per-site records.
    """
    versions = [("as entered", sites.get("as_entered")), ("after harmonisation", sites.get("harmonised"))]
    records = [(label, r) for label, recs in versions if isinstance(recs, list) for r in recs if isinstance(r, Mapping)]
    if not records:
        return None
    keys: list[str] = []
    for _, r in records:
        for k in r:
            if k not in keys and k != "site":
                keys.append(str(k))
    rows = []
    for label, r in records:
        rows.append((label, str(r.get("site", "")),
                     *(format_number(r.get(k)) if not isinstance(r.get(k), str) else str(r.get(k)) for k in keys)))
    caption = "Site effects: each site's subjects within the group mask, as entered"
    if sites.get("harmonised"):
        caption += " and after empirical-Bayes site harmonisation"
    return Table(columns=("data", "site", *[k.replace("_", " ") for k in keys]), rows=tuple(rows), caption=caption,
                 source=source)


def run_qc_frame(runs: Sequence[Any], measures: Sequence[str]) -> pd.DataFrame:
    """The QC numbers of every run as one table (``qc_runs.tsv``), one row per run.

    Parameters
    ----------
    runs : sequence of RunQc
    measures : sequence of str
        QC measure keys, in column order.

    Returns
    -------
    DataFrame
        Entities, site, status and reason, each measure and its ``<measure>_flagged``, the AR quantiles,
        each contrast's ``efficiency_<contrast>`` and the fit's lineage hash.
    """
    rows = []
    contrasts = sorted({c for r in runs for c in r.efficiency})
    for r in runs:
        row: dict[str, Any] = {"subject": r.subject, "session": r.session or None, "task": r.task, "run": r.run,
                               "site": r.site, "status": "excluded" if r.excluded else "kept",
                               "exclusion_reason": r.reason or None}
        for key in measures:
            value = r.values.get(key, math.nan)
            row[key] = value if math.isfinite(value) else None
            row[f"{key}_flagged"] = key in r.flags
        for q, value in zip(("05", "25", "50", "75", "95"), r.ar_quantiles):
            row[f"ar_lag1_q{q}"] = value if math.isfinite(value) else None
        for c in contrasts:
            value = r.efficiency.get(c, math.nan)
            row[f"efficiency_{c}"] = value if math.isfinite(value) else None
            row[f"efficiency_{c}_flagged"] = f"efficiency:{c}" in r.flags
        row["motion_source"] = r.motion_source
        row["fit_lineage_hash"] = r.fit_lineage
        rows.append(row)
    return pd.DataFrame(rows)


def weights_text(definition: Mapping[str, Any]) -> str:
    """A contrast definition in words: ``tap - flash`` style for t, rows for F.

    Examples
    --------
    >>> weights_text({"weights": {"flash": 1, "horn": -1}})
    'flash - horn'
    >>> weights_text({"rows": [{"tap": 1}, {"flash": 1}]})
    'F over rows [tap], [flash]'
    """
    def one(weights: Mapping[str, Any]) -> str:
        parts = []
        for i, (name, w) in enumerate(weights.items()):
            w = float(w)
            sign = "-" if w < 0 else "+"
            size = abs(w)
            term = name if size == 1 else f"{size:g} {name}"
            parts.append((f"-{term}" if sign == "-" else term) if i == 0 else f" {sign} {term}")
        return "".join(parts)

    if "weights" in definition:
        return one(definition["weights"])
    rows = definition.get("rows") or []
    return "F over rows " + ", ".join(f"[{one(r)}]" for r in rows)
