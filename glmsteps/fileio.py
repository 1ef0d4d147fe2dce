"""Atomic file writing and the small table readers every stage shares.

Every output is written to a temporary file in its destination folder and then
renamed over the final name (``os.replace`` is atomic on POSIX), so a crash or
an interrupted job never leaves a half-written output behind. Inputs are only
ever opened for reading.
"""

from __future__ import annotations

import contextlib
import json
import os
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:  # pandas is imported lazily: many steps never read a table
    import pandas as pd

#: Compound file extensions recognised when naming temporaries and sidecars.
KNOWN_EXTENSIONS: tuple[str, ...] = (".nii.gz", ".nii", ".tsv", ".json", ".h5", ".png", ".svg", ".html", ".txt")


def split_extension(path: str | os.PathLike[str]) -> tuple[str, str]:
    """Split a path into stem and (possibly compound) extension.

    Examples
    --------
    >>> split_extension("a/z.nii.gz")
    ('a/z', '.nii.gz')
    >>> split_extension("fit.h5")
    ('fit', '.h5')
    """
    text = os.fspath(path)
    for ext in KNOWN_EXTENSIONS:
        if text.endswith(ext):
            return text[: -len(ext)], ext
    stem, ext = os.path.splitext(text)
    return stem, ext


@contextlib.contextmanager
def atomic_path(final: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary path next to ``final``; rename it over ``final`` on success.

    The temporary keeps the final extension (``.nii.gz`` etc.) so that writers
    choose the right format. On an exception the temporary is removed and the
    final path is left untouched.
    """
    final_path = Path(final)
    final_path.parent.mkdir(parents=True, exist_ok=True)
    stem, ext = split_extension(final_path.name)
    tmp = final_path.parent / f".{stem}.{uuid.uuid4().hex[:8]}.tmp{ext}"
    try:
        yield tmp
        os.replace(tmp, final_path)
    finally:
        if tmp.exists():
            tmp.unlink()


def write_text(path: str | os.PathLike[str], text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot serialise {type(obj).__name__} to JSON")


def write_json(path: str | os.PathLike[str], data: Any) -> None:
    """Write ``data`` as indented JSON atomically (NaN is not allowed)."""
    write_text(path, json.dumps(data, indent=2, sort_keys=True, default=_json_default, allow_nan=False) + "\n")


def read_json(path: str | os.PathLike[str]) -> Any:
    """Read a JSON file."""
    with open(path, encoding="utf-8") as handle:
        return json.load(handle)


def write_tsv(path: str | os.PathLike[str], table: pd.DataFrame) -> None:
    """Write a table as a BIDS-style TSV atomically (missing values as ``n/a``)."""
    with atomic_path(path) as tmp:
        table.to_csv(tmp, sep="\t", index=False, na_rep="n/a", lineterminator="\n")


def read_tsv(path: str | os.PathLike[str]) -> pd.DataFrame:
    """Read a BIDS-style TSV: tab separated, ``n/a`` for missing values.

    Only ``n/a`` (and empty cells) count as missing, so that a condition called
    ``NA`` or ``null`` survives as text.
    """
    import pandas as pd

    try:
        return pd.read_csv(path, sep="\t", na_values=["n/a", ""], keep_default_na=False)
    except pd.errors.EmptyDataError:  # a table with no columns (e.g. no confounds selected)
        return pd.DataFrame()


def read_user_tsv(path: str | os.PathLike[str], error: type[Exception], fix: str) -> "pd.DataFrame":
    """Read a user's TSV (:func:`read_tsv`); an unreadable file raises ``error`` in one line.

    Before the table is parsed, the text is checked for what a table reader
    would misread silently or report only by its own line numbers: an empty
    file, bytes that are not UTF-8, a header separated by commas or semicolons,
    a column name given twice (a reader renames the second), and a data row
    with more or fewer cells than the header (one cell more makes a reader
    take the first column as row labels and shift every other column).

    Parameters
    ----------
    path : path-like
        The table.
    error : exception class
        The ``glmsteps.errors`` class to raise (EventsError, ConfoundsError, ...).
    fix : str
        How to fix it, appended to the message.
    """
    import pandas as pd

    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        raise error(f"{path}: cannot read the file ({exc.strerror or exc}); {fix}") from exc
    if not raw.strip():
        raise error(f"{path}: the file is empty (no header line); {fix}")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise error(f"{path}: not UTF-8 text (byte 0x{raw[exc.start]:02x} at byte {exc.start}); save it as UTF-8 "
                    f"({fix})") from exc
    lines = text.splitlines()
    header = lines[0].split("\t")
    if len(header) == 1:
        for sep, word in ((",", "commas"), (";", "semicolons")):
            if sep in lines[0]:
                raise error(f"{path}: the header line has no tab but {lines[0].count(sep)} {word} "
                            f"({lines[0][:60]!r}); a BIDS TSV separates its columns by tabs; {fix} (tab-separated)")
    repeated = sorted({name for name in header if header.count(name) > 1})
    if repeated:
        raise error(f"{path}: column(s) {repeated} appear more than once in the header line; keep one column of "
                    f"each name ({fix})")
    # a row with one cell more than the header would make a table reader take the first column as row
    # labels (and shift every column); blank lines are skipped, as the reader does
    row = 0
    for line in lines[1:]:
        if not line.strip():
            continue
        row += 1
        n_cells = line.count("\t") + 1
        if n_cells != len(header):
            raise error(f"{path}: data row {row} (1-based, header line not counted) has {n_cells} tab-separated "
                        f"cells, the header line {len(header)}; give every row one cell per column (n/a for a "
                        f"missing value) ({fix})")
    try:
        return read_tsv(path)
    except (OSError, UnicodeDecodeError, pd.errors.ParserError) as exc:
        reason = " ".join(str(exc).split())
        raise error(f"{path}: cannot read as a tab-separated table with a header line ({reason}); {fix}") from exc


def read_numeric_tsv(path: str | os.PathLike[str]) -> tuple[list[str], np.ndarray]:
    """Read an all-numeric TSV with a header row (e.g. a design matrix) without pandas.

    Returns
    -------
    names : list of str
        Column names from the header.
    values : ndarray, shape (n_rows, n_columns), float64
        ``n/a`` becomes NaN.

    Raises
    ------
    ValueError
        When a cell is not a number or a row has the wrong number of cells.
    """
    with open(path, encoding="utf-8") as handle:
        header = handle.readline().rstrip("\n").split("\t")
        rows = [line.rstrip("\n").split("\t") for line in handle if line.strip()]
    bad = next((i for i, row in enumerate(rows) if len(row) != len(header)), None)
    if bad is not None:
        raise ValueError(f"data row {bad + 1} has {len(rows[bad])} cells, the header has {len(header)}")
    values = np.array([[np.nan if cell == "n/a" else float(cell) for cell in row] for row in rows],
                      dtype=np.float64).reshape(len(rows), len(header))
    return header, values


@dataclass(frozen=True)
class MapIntent:
    """What a statistical map holds, for its NIfTI header.

    Attributes
    ----------
    code : str
        nibabel's name of the NIfTI-1 intent code (``"t test"``, ``"f test"``,
        ``"z score"``, ``"p value"``, ``"estimate"``, ``"none"``).
    parameters : tuple of float
        The intent parameters (t: dof; F: numerator and denominator dof).
    name : str
        Short intent name (at most 15 characters), e.g. ``"effect"``.
    """

    code: str = "none"
    parameters: tuple[float, ...] = ()
    name: str = ""


def save_nifti(path: str | os.PathLike[str], data: np.ndarray, affine: np.ndarray,
               header: Any | None = None, dtype: Any = np.float32, intent: MapIntent | None = None,
               description: str = "") -> None:
    """Save a 3D or 4D array as NIfTI-1 atomically.

    Parameters
    ----------
    path : path-like
        Destination; ``.nii`` or ``.nii.gz``.
    data : ndarray, shape (nx, ny, nz) or (nx, ny, nz, nt)
        Values; cast to ``dtype`` (float32 for stored maps).
    affine : ndarray, shape (4, 4)
        Voxel-to-world transform in mm; stored as both sform and qform (code 2,
        "aligned"; the qform drops any shear, the sform keeps the affine exactly).
    header : nibabel header, optional
        Template header (units, TR) to copy.
    intent : MapIntent, optional
        The statistic the map holds (NIfTI-1 intent code and parameters).
    description : str
        Short text for the header's ``descrip`` field (cut to 79 characters).

    Notes
    -----
    Spatial units are mm; a time unit (s) is set only on 4D images.
    """
    import warnings

    import nibabel as nib

    arr = np.asarray(data, dtype=dtype)
    aff = np.asarray(affine, dtype=np.float64)
    img = nib.Nifti1Image(arr, aff, header=header)
    img.set_data_dtype(dtype)
    img.set_sform(aff, code=2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # an oblique affine with shear: the qform keeps its rotation part
        img.set_qform(aff, code=2)
    img.header.set_xyzt_units("mm", "sec" if arr.ndim == 4 else "unknown")
    if intent is not None:
        img.header.set_intent(intent.code, intent.parameters, name=intent.name[:15])
    if description:
        img.header["descrip"] = description.encode("ascii", "replace")[:79]
    with atomic_path(path) as tmp:
        nib.save(img, tmp)
