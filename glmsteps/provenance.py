"""Provenance records: parameter hashes, input content hashes, lineage.

Every output of every step has a JSON sidecar (``sidecar_path``) holding a
provenance record; HDF5 outputs also carry it in their root attributes.

A record holds:

``step``
    The step's name (``validate_events``, ``fit``, ...).
``glmsteps_version``
    The library version that wrote it.
``params`` / ``params_hash``
    The exact settings the step used, and the sha256 of their canonical JSON.
``inputs``
    For each named input: its path (relative to the working folder where
    possible), the sha256 of its bytes, and the ``params_hash`` and
    ``lineage_hash`` of the step that produced it (``null`` for raw inputs).
``lineage_hash``
    sha256 of the step name, its ``params_hash`` and the lineage hashes of its
    inputs (a raw input's lineage hash is its content hash). Two outputs share
    a lineage hash exactly when the same settings and the same raw inputs made
    them; paths and timestamps never enter it.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import math
import os
import warnings
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

from . import __version__
from .errors import ProvenanceError
from .fileio import read_json, split_extension, write_json

_HASH_BLOCK = 1 << 20


def canonical_json(obj: Any) -> str:
    """Serialise ``obj`` to canonical JSON: sorted keys, no spaces, no NaN.

    Floats that are whole numbers are written as floats (``1.0``), so ``1``
    and ``1.0`` hash differently only where the config itself differs in type.
    """
    return json.dumps(_normalise(obj), sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def _normalise(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {str(k): _normalise(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_normalise(v) for v in obj]
    if hasattr(obj, "item") and callable(obj.item) and not isinstance(obj, (str, bytes)):
        return _normalise(obj.item())
    if isinstance(obj, float) and not math.isfinite(obj):
        raise ProvenanceError(f"parameter value {obj!r} is not finite; use a finite number")
    if isinstance(obj, Path):
        return str(obj)
    return obj


def hash_params(params: Mapping[str, Any]) -> str:
    """sha256 (hex) of the canonical JSON of ``params``."""
    return hashlib.sha256(canonical_json(params).encode("utf-8")).hexdigest()


def hash_file(path: str | os.PathLike[str]) -> str:
    """sha256 (hex) of a file's bytes, read in 1 MiB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(_HASH_BLOCK), b""):
            digest.update(block)
    return digest.hexdigest()


def sidecar_path(path: str | os.PathLike[str]) -> Path:
    """The JSON sidecar of an output: same stem, ``.json`` extension.

    A JSON output is its own sidecar (its record sits under ``provenance``).

    Examples
    --------
    >>> str(sidecar_path("out/contrast-a/z.nii.gz"))
    'out/contrast-a/z.json'
    """
    stem, ext = split_extension(path)
    return Path(stem + ".json") if ext != ".json" else Path(path)


def display_path(path: str | os.PathLike[str]) -> str:
    """A path as recorded: relative to the working folder when below it."""
    p = Path(path)
    try:
        return str(p.resolve().relative_to(Path.cwd().resolve()))
    except ValueError:
        return str(p)


def read_record(path: str | os.PathLike[str]) -> dict[str, Any] | None:
    """The provenance record of an output, or ``None`` for a raw input.

    Looks in the JSON sidecar (or, for a JSON output, its ``provenance`` key).
    """
    side = sidecar_path(path)
    if not side.exists():
        return None
    try:
        data = read_json(side)
    except (OSError, json.JSONDecodeError) as exc:
        raise ProvenanceError(f"{side}: cannot read provenance sidecar ({exc}); delete it and rerun the step") from exc
    if isinstance(data, dict) and "provenance" in data and isinstance(data["provenance"], dict):
        data = data["provenance"]
    if not isinstance(data, dict) or "lineage_hash" not in data:
        return None
    return data


def describe_input(path: str | os.PathLike[str], sha256: str | None = None) -> dict[str, Any]:
    """Describe one input file for a record: path, content hash, producer hashes.

    ``sha256`` is the file's hash when the caller already computed it (else it is read here).
    """
    content = sha256 or hash_file(path)
    producer = read_record(path)
    return {
        "path": display_path(path),
        "sha256": content,
        "step": producer.get("step") if producer else None,
        "params_hash": producer.get("params_hash") if producer else None,
        "lineage_hash": producer["lineage_hash"] if producer else content,
    }


def lineage_hash(step: str, params_hash: str, inputs: Mapping[str, Any]) -> str:
    """Combine a step's identity with its inputs' lineage hashes (sha256 hex)."""
    lineage = {name: ([d["lineage_hash"] for d in desc] if isinstance(desc, list) else desc["lineage_hash"])
               for name, desc in inputs.items()}
    payload = canonical_json({"step": step, "params_hash": params_hash, "inputs": lineage})
    return hashlib.sha256(payload.encode("utf-8")).hexdigest()


def build_record(step: str, params: Mapping[str, Any],
                 inputs: Mapping[str, str | os.PathLike[str] | Sequence[str | os.PathLike[str]]],
                 warnings_seen: Sequence[str] = (), precomputed: Mapping[str, str] | None = None,
                 **extra: Any) -> dict[str, Any]:
    """Build the provenance record of a step's outputs.

    Parameters
    ----------
    step : str
        Step name.
    params : mapping
        Exactly the settings the step used (its rule's ``params``).
    inputs : mapping of name to path or list of paths
        The files the step read.
    warnings_seen : sequence of str
        Warning messages raised while the step ran.
    precomputed : mapping of input name to sha256 hex, optional
        Inputs (single paths) whose bytes the step hashed while reading them (the fit
        hashes its BOLD as it streams it); they are not read again.
    **extra
        Step-specific summary fields (counts, exclusions, ...).
    """
    described: dict[str, Any] = {}
    known = precomputed or {}
    for name, value in inputs.items():
        if name in known:
            described[name] = describe_input(value, sha256=known[name])
        elif isinstance(value, (str, os.PathLike)):
            described[name] = describe_input(value)
        else:
            described[name] = [describe_input(v) for v in value]
    p_hash = hash_params(params)
    record: dict[str, Any] = {
        "step": step,
        "glmsteps_version": __version__,
        "params": _normalise(dict(params)),
        "params_hash": p_hash,
        "inputs": described,
        "lineage_hash": lineage_hash(step, p_hash, described),
        "warnings": list(warnings_seen),
    }
    record.update(extra)
    return record


#: Sidecars held back by :func:`deferred_sidecars` blocks (innermost last).
_PENDING_SIDECARS: list[dict[Path, dict[str, Any]]] = []


def write_sidecar(output: str | os.PathLike[str], record: Mapping[str, Any], **extra: Any) -> Path:
    """Write the sidecar of ``output`` atomically; return its path.

    Inside a :func:`deferred_sidecars` block (every workflow job runs in one)
    the sidecar is held back and written only after all the job's outputs, by
    :func:`write_deferred_sidecars`, so that a killed job never leaves a
    sidecar describing an output that was not written.
    """
    side = sidecar_path(output)
    data = dict(record)
    data.update(extra)
    if _PENDING_SIDECARS:
        _PENDING_SIDECARS[-1][side] = data
    else:
        write_json(side, data)
    return side


@contextlib.contextmanager
def deferred_sidecars() -> Iterator[dict[Path, dict[str, Any]]]:
    """Hold back every :func:`write_sidecar` inside the block; yields the pending sidecars."""
    pending: dict[Path, dict[str, Any]] = {}
    _PENDING_SIDECARS.append(pending)
    try:
        yield pending
    finally:
        _PENDING_SIDECARS.remove(pending)


@contextlib.contextmanager
def collect_warnings() -> Iterator[list[str]]:
    """Record every warning raised inside the block as text, logging each as it is raised.

    Yields a list that fills with ``"Category: message"`` strings, for the
    sidecar's ``warnings`` field. Each warning is also logged at once (logger
    ``glmsteps``: the job's log file and stderr), so a warning raised before a
    job fails is still seen.
    """
    messages: list[str] = []
    logger = logging.getLogger("glmsteps")

    def show(message: Warning | str, category: type[Warning], filename: str, lineno: int,
             file: Any = None, line: str | None = None) -> None:
        text = f"{category.__name__}: {message}"
        messages.append(text)
        logger.warning(text)

    with warnings.catch_warnings():
        warnings.simplefilter("always")
        warnings.showwarning = show
        yield messages


#: Sidecar key holding the sha256 of each output the sidecar describes (by file name).
OUTPUT_HASHES_KEY = "output_sha256"


def write_deferred_sidecars(pending: Mapping[Path, Mapping[str, Any]],
                            outputs: Sequence[str | os.PathLike[str]]) -> None:
    """Write held-back sidecars, each with the sha256 of the outputs it describes.

    Parameters
    ----------
    pending : mapping of sidecar path to its content
        From :func:`deferred_sidecars`.
    outputs : sequence of path-like
        The finished job's outputs. Each output's sha256 goes into its sidecar
        under :data:`OUTPUT_HASHES_KEY` (by file name): into the pending
        content, or, when the sidecar is a JSON output the job wrote itself,
        into that file. A JSON output that is its own sidecar cannot hold its
        own hash and is left as it is.

    Notes
    -----
    ``glmsteps audit --verify`` compares an output's current bytes with this
    hash, so an edit to the audited map itself is found (SHA-256, FIPS 180-4).
    """
    hashes: dict[Path, dict[str, str]] = {}
    for output in outputs:
        path = Path(output)
        side = sidecar_path(path)
        if side != path and path.is_file():
            hashes.setdefault(side, {})[path.name] = hash_file(path)
    for side, data in pending.items():
        content = dict(data)
        if side in hashes:
            content[OUTPUT_HASHES_KEY] = {**(content.get(OUTPUT_HASHES_KEY) or {}), **hashes.pop(side)}
        write_json(side, content)
    for side, found in hashes.items():
        if not side.is_file():
            continue
        content = read_json(side)
        if isinstance(content, dict):
            # a JSON output holds its record under "provenance", where read_record finds it
            holder = content["provenance"] if isinstance(content.get("provenance"), dict) else content
            holder[OUTPUT_HASHES_KEY] = {**(holder.get(OUTPUT_HASHES_KEY) or {}), **found}
            write_json(side, content)
