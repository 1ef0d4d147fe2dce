"""The provenance chain of an output as a dataclass tree (:func:`build_chain`, pure over records).

Part of :mod:`glmsteps.audit` (see its docstring).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from ..errors import ProvenanceError
from ..provenance import OUTPUT_HASHES_KEY, canonical_json, hash_params, lineage_hash

#: Number of hex digits of a hash shown in text output.
SHORT_HASH_LENGTH = 12
#: Shown in a diff for a setting that one side does not have.
NOT_SET = "(not set)"
#: A function returning the provenance record stored for a recorded path, or
#: ``None`` when the path has no record (a raw input, or a lost sidecar).
RecordLoader = Callable[[str], "Mapping[str, Any] | None"]
#: A function returning the current sha256 (hex) of a recorded path, or ``None``
#: when the file is missing.
ContentHasher = Callable[[str], "str | None"]
InputKind = Literal["raw", "step", "unresolved"]
CheckStatus = Literal["ok", "changed", "missing", "stale", "record_missing", "record_inconsistent", "unrecorded"]


# ----------------------------------------------------------------------------
# The chain as a dataclass tree
# ----------------------------------------------------------------------------

@dataclass
class FileNode:
    """One input file of a step, as the consuming step recorded it.

    Attributes
    ----------
    name : str
        Input name in the consumer's record (``events``, ``effect``...).
    index : int or None
        Position in a list input, ``None`` for a single file.
    path : str
        Path as recorded (relative to the root folder, or absolute).
    sha256 : str
        Content hash recorded when the consumer ran (64 hex digits).
    lineage_hash : str
        Lineage hash recorded for the file (its content hash for a raw input).
    step, params_hash : str or None
        Producer step and its params hash as recorded; ``None`` for a raw input.
    producer : StepNode or None
        The producing step, read from the file's current record; ``None`` for
        a raw input or when that record cannot be found (``kind`` "unresolved").
    """

    name: str
    index: int | None
    path: str
    sha256: str
    lineage_hash: str
    step: str | None
    params_hash: str | None
    producer: StepNode | None = None

    @property
    def kind(self) -> InputKind:
        """``raw``, ``step`` (producer record found) or ``unresolved``."""
        if self.step is None:
            return "raw"
        return "step" if self.producer is not None else "unresolved"

    @property
    def label(self) -> str:
        """Input name with its list position, e.g. ``effect[1]``."""
        return self.name if self.index is None else f"{self.name}[{self.index}]"


@dataclass
class StepNode:
    """One run of a step (one job), shared by all its outputs in the chain.

    Attributes
    ----------
    number : int
        1-based position in depth-first pre-order; a step met again later is
        referred to by this number instead of being repeated.
    step : str
        Step name.
    outputs : list of str
        The outputs of this job met in the chain (the audited path first).
    params : dict
        Settings the step used.
    params_hash, lineage_hash : str
        As recorded (64 hex digits).
    glmsteps_version : str or None
        Library version that wrote the record.
    warnings : list of str
        Warnings recorded while the step ran.
    inputs : list of FileNode
        The files the step read, in record order.
    issues : list of str
        Inconsistencies found in the record itself (hashes that do not
        recompute, a cycle).
    output_hashes : dict of str to str
        sha256 of the job's outputs as written, by file name (the sidecar's
        ``output_sha256``; empty for records written before it existed).
    """

    number: int
    step: str
    outputs: list[str]
    params: dict[str, Any]
    params_hash: str
    lineage_hash: str
    glmsteps_version: str | None = None
    warnings: list[str] = field(default_factory=list)
    inputs: list[FileNode] = field(default_factory=list)
    issues: list[str] = field(default_factory=list)
    output_hashes: dict[str, str] = field(default_factory=dict)


@dataclass
class Chain:
    """The provenance chain of one output.

    Attributes
    ----------
    target : str
        The audited output, as given.
    root : str
        Folder recorded relative paths were resolved against (``""`` if none).
    top : StepNode
        The step that made ``target``.
    """

    target: str
    root: str
    top: StepNode


def short_hash(value: str | None) -> str:
    """First :data:`SHORT_HASH_LENGTH` hex digits of a hash (``-`` for ``None``)."""
    return value[:SHORT_HASH_LENGTH] if value else "-"


def iter_steps(chain: Chain) -> Iterator[StepNode]:
    """Every distinct step of the chain once, in depth-first pre-order (by ``number``)."""
    seen: set[int] = set()
    stack = [chain.top]
    ordered: list[StepNode] = []
    while stack:
        node = stack.pop()
        if node.number in seen:
            continue
        seen.add(node.number)
        ordered.append(node)
        stack.extend(f.producer for f in reversed(node.inputs) if f.producer is not None)
    yield from sorted(ordered, key=lambda n: n.number)


def raw_inputs(chain: Chain) -> list[FileNode]:
    """The raw inputs of the chain, one per (path, sha256), in order of appearance."""
    out: dict[tuple[str, str], FileNode] = {}
    for node in iter_steps(chain):
        for f in node.inputs:
            if f.kind == "raw":
                out.setdefault((f.path, f.sha256), f)
    return list(out.values())


def _require(record: Mapping[str, Any], key: str, kind: type, where: str) -> Any:
    value = record.get(key)
    if not isinstance(value, kind):
        raise ProvenanceError(f"{where}: provenance record has no valid {key!r} (found {value!r}); "
                              "rerun the step that made this file")
    return value


def _step_key(record: Mapping[str, Any]) -> str:
    """Identity of a job: all outputs of one job share step, hashes and input files."""
    inputs = record.get("inputs") or {}
    files = {name: ([(d.get("path"), d.get("sha256")) for d in desc] if isinstance(desc, list)
                    else (desc.get("path"), desc.get("sha256")))
             for name, desc in inputs.items()}
    return canonical_json({"step": record.get("step"), "params_hash": record.get("params_hash"),
                           "lineage_hash": record.get("lineage_hash"), "inputs": files})


def record_issues(record: Mapping[str, Any]) -> list[str]:
    """Inconsistencies of a record with itself: hashes that do not recompute.

    Parameters
    ----------
    record : mapping
        A provenance record.

    Returns
    -------
    list of str
        Empty when ``params_hash`` and ``lineage_hash`` recompute.

    Notes
    -----
    ``params_hash = sha256(canonical_json(params))`` and
    ``lineage_hash = sha256(canonical_json({step, params_hash, inputs: lineage
    hashes}))`` (:mod:`glmsteps.provenance`); canonical JSON is RFC 8259 JSON
    with sorted keys and no spaces.
    """
    issues = []
    try:
        if hash_params(record.get("params") or {}) != record.get("params_hash"):
            issues.append("params_hash does not match the recorded params (was the sidecar edited?)")
        if lineage_hash(str(record.get("step")), str(record.get("params_hash")),
                        record.get("inputs") or {}) != record.get("lineage_hash"):
            issues.append("lineage_hash does not match the recorded inputs (was the sidecar edited?)")
    except (KeyError, TypeError, AttributeError, ProvenanceError):
        issues.append("record cannot be re-hashed (malformed inputs or params)")
    return issues


def _file_node(name: str, index: int | None, desc: Any, where: str) -> FileNode:
    label = name if index is None else f"{name}[{index}]"
    if not isinstance(desc, Mapping):
        raise ProvenanceError(f"{where}: input {label!r} of the provenance record is not an object; "
                              "rerun the step that made this file")
    path = _require(desc, "path", str, f"{where} input {label}")
    sha = _require(desc, "sha256", str, f"{where} input {label}")
    lin = _require(desc, "lineage_hash", str, f"{where} input {label}")
    step = desc.get("step")
    return FileNode(name=name, index=index, path=path, sha256=sha, lineage_hash=lin,
                    step=str(step) if step is not None else None,
                    params_hash=desc.get("params_hash"))


def build_chain(target: str, record: Mapping[str, Any], load_record: RecordLoader, root: str = "") -> Chain:
    """Build the provenance chain of an output from its record.

    Parameters
    ----------
    target : str
        The output being audited (shown as given).
    record : mapping
        Its provenance record.
    load_record : callable
        ``load_record(recorded_path) -> record or None`` for the files the
        records name as produced inputs.
    root : str
        Folder relative paths were resolved against (informative only).

    Returns
    -------
    Chain
        A tree of :class:`StepNode` and :class:`FileNode`; one job reached
        through several of its outputs is a single shared node.

    Raises
    ------
    ProvenanceError
        A record lacks ``step``, ``params_hash``, ``lineage_hash`` or
        well-formed ``inputs``.

    Notes
    -----
    A job is identified by ``(step, params_hash, lineage_hash, input paths and
    sha256)``: the outputs of one job (``effect``, ``variance``, ...) share
    these, while two runs of a step on identical copies of the data at other
    paths do not. A produced input whose record is missing stays a leaf of
    kind ``unresolved``. The provenance records are the project's own format
    (:mod:`glmsteps.provenance`); no published method is involved.
    """
    nodes: dict[str, StepNode] = {}
    in_progress: set[str] = set()
    counter = [0]

    def visit(path: str, rec: Mapping[str, Any]) -> StepNode:
        key = _step_key(rec)
        if key in nodes:
            node = nodes[key]
            if path not in node.outputs:
                node.outputs.append(path)
            if key in in_progress and "cycle" not in " ".join(node.issues):
                node.issues.append(f"cycle: {path} is among its own inputs")
            return node
        step = _require(rec, "step", str, path)
        params = rec.get("params") or {}
        if not isinstance(params, Mapping):
            raise ProvenanceError(f"{path}: provenance 'params' is not an object; rerun the step that made this file")
        inputs = _require(rec, "inputs", Mapping, path)
        counter[0] += 1
        node = StepNode(number=counter[0], step=step, outputs=[], params=dict(params),
                        params_hash=_require(rec, "params_hash", str, path),
                        lineage_hash=_require(rec, "lineage_hash", str, path),
                        glmsteps_version=rec.get("glmsteps_version"),
                        warnings=[str(w) for w in rec.get("warnings") or []],
                        issues=record_issues(rec),
                        output_hashes={str(k): str(v) for k, v in (rec.get(OUTPUT_HASHES_KEY) or {}).items()})
        if path not in node.outputs:
            node.outputs.append(path)
        nodes[key] = node
        in_progress.add(key)
        for name, desc in inputs.items():
            descs = list(enumerate(desc)) if isinstance(desc, list) else [(None, desc)]
            for index, one in descs:
                f = _file_node(str(name), index, one, path)
                if f.step is not None:
                    sub = load_record(f.path)
                    if sub is not None:
                        f.producer = visit(f.path, sub)
                node.inputs.append(f)
        in_progress.discard(key)
        return node

    return Chain(target=target, root=root, top=visit(target, record))
