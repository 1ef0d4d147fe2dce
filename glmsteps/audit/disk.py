"""The disk layer of the audit: finding records and files, loading a chain (``glmsteps audit``).

Part of :mod:`glmsteps.audit` (see its docstring).
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from ..errors import ProvenanceError
from ..provenance import hash_file, lineage_hash, read_record, sidecar_path
from .chain import Chain, build_chain


# ----------------------------------------------------------------------------
# Disk layer
# ----------------------------------------------------------------------------

def _recorded_paths(record: Mapping[str, Any]) -> list[str]:
    paths = []
    for desc in (record.get("inputs") or {}).values():
        for d in desc if isinstance(desc, list) else [desc]:
            if isinstance(d, Mapping) and isinstance(d.get("path"), str):
                paths.append(d["path"])
    return paths


def find_root(target: str | os.PathLike[str], record: Mapping[str, Any]) -> Path:
    """The folder the recorded relative input paths of ``record`` resolve against.

    Walks up from the output's folder and returns the nearest folder under
    which all relative input paths exist; failing that, the one where most
    exist; failing that, the current folder.
    """
    relative = [p for p in _recorded_paths(record) if not os.path.isabs(p)]
    cwd = Path.cwd().resolve()
    if not relative:
        return cwd
    start = Path(target).resolve().parent
    candidates = [start, *start.parents]
    if cwd not in candidates:
        candidates.append(cwd)
    best, best_count = cwd, 0
    for folder in candidates:
        count = sum((folder / p).exists() for p in relative)
        if count == len(relative):
            return folder
        if count > best_count:
            best, best_count = folder, count
    return best


def resolve_recorded(path: str, root: str | os.PathLike[str]) -> Path:
    """A recorded path on disk: absolute as is, relative below ``root``."""
    p = Path(path)
    return p if p.is_absolute() else Path(root) / p


def load_record_from_disk(path: str | os.PathLike[str]) -> dict[str, Any] | None:
    """The record of a file: its sidecar, or for HDF5 its root attribute ``provenance``."""
    record = read_record(path)
    if record is None and os.fspath(path).endswith(".h5") and Path(path).is_file():
        import h5py

        try:
            with h5py.File(path, "r") as handle:
                text = handle.attrs.get("provenance")
        except OSError as exc:
            raise ProvenanceError(f"{path}: cannot read HDF5 file ({exc}); check the file is a complete fit file") from exc
        if text is not None:
            if isinstance(text, bytes):
                text = text.decode("utf-8")
            try:
                data = json.loads(str(text))
            except json.JSONDecodeError as exc:
                raise ProvenanceError(f"{path}: root attribute 'provenance' is not valid JSON ({exc}); "
                                      "rerun the step that made it") from exc
            if isinstance(data, dict) and "lineage_hash" in data:
                record = data
    return record


def current_sha256(path: str, root: str | os.PathLike[str]) -> str | None:
    """sha256 of a recorded path's current bytes, ``None`` if it is missing."""
    p = resolve_recorded(path, root)
    try:
        return hash_file(p)
    except (FileNotFoundError, IsADirectoryError, NotADirectoryError):
        return None


def load_chain(target: str | os.PathLike[str], root: str | os.PathLike[str] | None = None) -> Chain:
    """Read the chain of an output from disk.

    Parameters
    ----------
    target : path-like
        An output written by a glmsteps step (or its JSON sidecar).
    root : path-like, optional
        Folder the workflow ran in; found with :func:`find_root` if omitted.

    Raises
    ------
    ProvenanceError
        The output does not exist or has no provenance record.
    """
    target_path = Path(target)
    if not target_path.exists():
        raise ProvenanceError(f"{target}: no such file; give the path of an output written by glmsteps")
    record = load_record_from_disk(target_path)
    if record is None:
        raise ProvenanceError(f"{target}: no provenance record (expected sidecar {sidecar_path(target_path)}); "
                              "audit works on outputs written by glmsteps steps, not on raw inputs")
    if root is None:
        root_path = find_root(target_path, record)
    else:
        root_path = Path(root)
        if not root_path.is_dir():
            raise ProvenanceError(f"--root {root}: not a folder; give the folder the workflow ran in")
    return build_chain(os.fspath(target), record,
                       lambda p: load_record_from_disk(resolve_recorded(p, root_path)), str(root_path))
