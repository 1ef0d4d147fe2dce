"""Audit and diff of provenance chains.

Every glmsteps output carries a provenance record (see :mod:`glmsteps.provenance`)
naming the step that made it, that step's settings and the content and lineage
hashes of the files it read. Following the records of those files backwards
gives the chain of steps from an output to the raw inputs.

This module holds

* pure functions over records and chains: :func:`build_chain` (records -> a
  dataclass tree, given a record loader), :func:`render_text`,
  :func:`chain_to_dict` / :func:`chain_from_dict`, :func:`verify_chain` (given
  a function returning a file's current sha256), :func:`diff_chains`,
  :func:`describe_params`;
* a small disk layer (:func:`find_root`, :func:`load_record_from_disk`,
  :func:`current_sha256`, :func:`load_chain`) used by ``glmsteps audit`` and
  ``glmsteps diff`` (:mod:`glmsteps.cli`).

Recorded input paths are relative to the folder the workflow ran in (the
Snakemake working folder) when they lay below it, absolute otherwise; the
disk layer resolves them against a *root* folder.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from .errors import ProvenanceError
from .provenance import (OUTPUT_HASHES_KEY, canonical_json, hash_file, hash_params, lineage_hash, read_record,
                         sidecar_path)
from .settings import setting_labels, setting_null_meanings, setting_order

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


# ----------------------------------------------------------------------------
# Settings in plain words
# ----------------------------------------------------------------------------

def flatten_params(params: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """Nested settings as one level of dotted keys (lists stay values).

    Examples
    --------
    >>> flatten_params({"fit": {"autocorrelation": "ar1"}, "tail": "two"})
    {'fit.autocorrelation': 'ar1', 'tail': 'two'}
    """
    flat: dict[str, Any] = {}
    for key, value in params.items():
        dotted = f"{prefix}{key}"
        if isinstance(value, Mapping) and value:
            flat.update(flatten_params(value, dotted + "."))
        else:
            flat[dotted] = value
    return flat


def format_value(value: Any) -> str:
    """A setting's value in plain words: yes/no, none, lists joined by commas.

    Examples
    --------
    >>> format_value(True), format_value(None), format_value([1, 2.5]), format_value(128.0)
    ('yes', 'none', '1, 2.5', '128')
    """
    if isinstance(value, bool):
        return "yes" if value else "no"
    if value is None:
        return "none"
    if isinstance(value, float):
        return format(value, ".10g")
    if isinstance(value, (list, tuple)):
        return ", ".join(format_value(v) for v in value) if value else "none"
    if isinstance(value, Mapping):
        return canonical_json(value) if value else "none"
    return str(value)


def setting_label(key: str) -> tuple[str, str]:
    """Plain-word label and unit of a (dotted) param key, from config/schema.yaml's ``title`` and ``unit``
    (:func:`glmsteps.settings.setting_labels`).

    A key under a labelled one (a condition of ``modulators``, a column of a contrast's weights) is shown
    as that label with the rest of the key in brackets; another nested key by its section and the label
    of its last part (``fit.autocorrelation``: "fit autocorrelation model"); unknown keys label themselves.

    Examples
    --------
    >>> setting_label("ar_smoothing_fwhm_mm"), setting_label("modulators.go")
    (('smoothing of AR coefficients', 'mm FWHM'), ('parametric modulators (go)', ''))
    """
    labels = setting_labels()
    if key in labels:
        return labels[key]
    parts = key.split(".")
    for n in range(len(parts) - 1, 0, -1):
        head = ".".join(parts[:n])
        if head in labels:
            return f"{labels[head][0]} ({'.'.join(parts[n:])})", ""
    if parts[-1] in labels:
        label, unit = labels[parts[-1]]
        return f"{'.'.join(parts[:-1])} {label}", unit
    return key, ""


def _setting_order(key: str) -> tuple[str, int, str]:
    order = setting_order()
    prefix, _, last = key.rpartition(".")
    return prefix, order.get(key, order.get(last, len(order))), last


def describe_params(params: Mapping[str, Any]) -> list[str]:
    """Each setting as ``"label: value unit"``.

    Known settings come first, in the order of the steps' settings classes
    (:data:`glmsteps.settings.SETTINGS_CLASSES`), then the others by key;
    nested settings are grouped by section.

    Examples
    --------
    >>> describe_params({"ar_smoothing_fwhm_mm": 0, "autocorrelation": "ar1"})
    ['autocorrelation model: ar1', 'smoothing of AR coefficients: 0 mm FWHM']
    """
    out = []
    meanings = setting_null_meanings()
    for key, value in sorted(flatten_params(params).items(), key=lambda kv: _setting_order(kv[0])):
        label, unit = setting_label(key)
        if value is None and key in meanings:
            out.append(f"{label}: {meanings[key]}")
            continue
        text = format_value(value)
        out.append(f"{label}: {text} {unit}" if unit and text != "none" else f"{label}: {text}")
    return out


# ----------------------------------------------------------------------------
# Text and JSON renderings
# ----------------------------------------------------------------------------

def _step_header(node: StepNode) -> str:
    return (f"[{node.number}] {node.step}  params {short_hash(node.params_hash)}  "
            f"lineage {short_hash(node.lineage_hash)}")


def render_text(chain: Chain) -> str:
    """The chain as an indented text tree; a step met again is referenced by number.

    Parameters
    ----------
    chain : Chain

    Returns
    -------
    str
        Lines end with ``\\n``; hashes shortened to 12 hex digits.
    """
    lines = [f"provenance of {chain.target}" + (f"  (paths relative to {chain.root})" if chain.root else "")]
    shown: set[int] = set()
    settings_shown: dict[tuple[str, str], int] = {}

    def body(node: StepNode, pad: str) -> None:
        shown.add(node.number)
        first = settings_shown.setdefault((node.step, node.params_hash), node.number)
        if first != node.number:
            lines.append(f"{pad}settings: as step [{first}]")
        else:
            settings = describe_params(node.params)
            lines.append(f"{pad}settings: " + ("; ".join(settings) if settings else "none"))
        if node.glmsteps_version:
            lines.append(f"{pad}written by glmsteps {node.glmsteps_version}")
        for w in node.warnings:
            lines.append(f"{pad}warning: {w}")
        for issue in node.issues:
            lines.append(f"{pad}! {issue}")
        for i, f in enumerate(node.inputs):
            last = i == len(node.inputs) - 1
            branch, child_pad = ("`-- ", pad + "    ") if last else ("|-- ", pad + "|   ")
            head = f"{pad}{branch}{f.label}: {f.path}  sha256 {short_hash(f.sha256)}"
            if f.kind == "raw":
                lines.append(head + "  (raw input)")
            elif f.kind == "unresolved":
                lines.append(head + f"  (made by {f.step}, params {short_hash(f.params_hash)}, "
                             f"lineage {short_hash(f.lineage_hash)}; its record was not found)")
            else:
                assert f.producer is not None
                if f.producer.lineage_hash != f.lineage_hash:
                    head += f"  ! recorded lineage {short_hash(f.lineage_hash)} differs from its current record"
                if f.producer.number in shown:
                    lines.append(head + f"  -> step [{f.producer.number}] {f.producer.step} (shown above)")
                else:
                    lines.append(head)
                    lines.append(f"{child_pad}{_step_header(f.producer)}")
                    body(f.producer, child_pad + "    ")

    lines.append(_step_header(chain.top))
    body(chain.top, "    ")
    raws = raw_inputs(chain)
    steps = list(iter_steps(chain))
    lines.append(f"{len(steps)} step(s); {len(raws)} raw input(s):")
    for f in raws:
        lines.append(f"    {f.path}  sha256 {short_hash(f.sha256)}")
    return "\n".join(lines) + "\n"


@dataclass(frozen=True)
class StepSummary:
    """All jobs of one step with the same settings, in a chain.

    Attributes
    ----------
    step : str
    params_hash : str
    params : dict
    n_jobs : int
        Distinct jobs of this step with these settings.
    warnings : list of str
        Their warnings, each once.
    """

    step: str
    params_hash: str
    params: dict[str, Any]
    n_jobs: int
    warnings: list[str]


def summarise_steps(chain: Chain) -> list[StepSummary]:
    """The chain's steps grouped by (step, settings), top first, in order of first appearance."""
    groups: dict[tuple[str, str], list[StepNode]] = {}
    for node in iter_steps(chain):
        groups.setdefault((node.step, node.params_hash), []).append(node)
    out = []
    for (step, params_hash), nodes in groups.items():
        warned = list(dict.fromkeys(w for n in nodes for w in n.warnings))
        out.append(StepSummary(step, params_hash, nodes[0].params, len(nodes), warned))
    return out


def render_summary(chain: Chain) -> str:
    """The chain in short: each step once with its settings and job count, the raw inputs by kind.

    Parameters
    ----------
    chain : Chain

    Returns
    -------
    str
        What ``glmsteps audit`` prints by default; ``--full`` prints
        :func:`render_text`, every job and file.
    """
    lines = [f"provenance of {chain.target}" + (f"  (paths relative to {chain.root})" if chain.root else ""),
             f"made by {chain.top.step}  params {short_hash(chain.top.params_hash)}  "
             f"lineage {short_hash(chain.top.lineage_hash)}"]
    summaries = summarise_steps(chain)
    n_jobs = sum(s.n_jobs for s in summaries)
    lines.append(f"{n_jobs} job(s) of {len({s.step for s in summaries})} step(s), each setting shown once:")
    for s in summaries:
        settings = describe_params(s.params)
        jobs = f"{s.n_jobs} job{'s' if s.n_jobs != 1 else ''}"
        lines.append(f"  {s.step} ({jobs}, params {short_hash(s.params_hash)}): "
                     + ("; ".join(settings) if settings else "no settings"))
        for w in s.warnings:
            lines.append(f"      warning: {w}")
    for node in iter_steps(chain):
        for issue in node.issues:
            lines.append(f"  ! {node.step} [{node.number}]: {issue}")
    raws = raw_inputs(chain)
    kinds: dict[str, list[FileNode]] = {}
    for node in iter_steps(chain):
        for f in node.inputs:
            if f.kind == "raw":
                kinds.setdefault(f.name, [])
                if all((g.path, g.sha256) != (f.path, f.sha256) for g in kinds[f.name]):
                    kinds[f.name].append(f)
    lines.append(f"{len(raws)} raw input(s):")
    for name, files in kinds.items():
        example = files[0]
        more = f" and {len(files) - 1} more" if len(files) > 1 else ""
        lines.append(f"  {name}: {len(files)} file(s), e.g. {example.path}  sha256 {short_hash(example.sha256)}{more}")
    unresolved = [f for n in iter_steps(chain) for f in n.inputs if f.kind == "unresolved"]
    if unresolved:
        lines.append(f"! {len(unresolved)} produced input(s) have no record (e.g. {unresolved[0].path})")
    lines.append("every job and file: glmsteps audit --full")
    return "\n".join(lines) + "\n"


def _step_to_dict(node: StepNode, shown: set[int]) -> dict[str, Any]:
    if node.number in shown:
        return {"see_step": node.number}
    shown.add(node.number)
    return {
        "number": node.number, "step": node.step, "outputs": list(node.outputs),
        "params": node.params, "settings": describe_params(node.params),
        "params_hash": node.params_hash, "lineage_hash": node.lineage_hash,
        "glmsteps_version": node.glmsteps_version, "warnings": list(node.warnings),
        "issues": list(node.issues), "output_hashes": dict(node.output_hashes),
        "inputs": [{"name": f.name, "index": f.index, "path": f.path, "sha256": f.sha256,
                    "lineage_hash": f.lineage_hash, "step": f.step, "params_hash": f.params_hash,
                    "kind": f.kind,
                    "producer": _step_to_dict(f.producer, shown) if f.producer is not None else None}
                   for f in node.inputs],
    }


def chain_to_dict(chain: Chain) -> dict[str, Any]:
    """The chain as JSON-ready data (full hashes); a repeated step is ``{"see_step": n}``."""
    return {"target": chain.target, "root": chain.root, "top": _step_to_dict(chain.top, set()),
            "raw_inputs": [{"path": f.path, "sha256": f.sha256} for f in raw_inputs(chain)]}


def chain_from_dict(data: Mapping[str, Any]) -> Chain:
    """Inverse of :func:`chain_to_dict` (``settings``, ``kind`` and ``raw_inputs`` are derived, so ignored)."""
    by_number: dict[int, StepNode] = {}

    def step(d: Mapping[str, Any]) -> StepNode:
        if "see_step" in d:
            return by_number[int(d["see_step"])]
        node = StepNode(number=int(d["number"]), step=d["step"], outputs=list(d["outputs"]),
                        params=dict(d["params"]), params_hash=d["params_hash"], lineage_hash=d["lineage_hash"],
                        glmsteps_version=d.get("glmsteps_version"), warnings=list(d.get("warnings", [])),
                        issues=list(d.get("issues", [])), output_hashes=dict(d.get("output_hashes", {})))
        by_number[node.number] = node
        for f in d["inputs"]:
            node.inputs.append(FileNode(name=f["name"], index=f["index"], path=f["path"], sha256=f["sha256"],
                                        lineage_hash=f["lineage_hash"], step=f["step"],
                                        params_hash=f["params_hash"],
                                        producer=step(f["producer"]) if f["producer"] is not None else None))
        return node

    return Chain(target=data["target"], root=data["root"], top=step(data["top"]))


def render_json(chain: Chain, checks: list[Check] | None = None) -> str:
    """The chain (and verification results, if given) as indented JSON text."""
    data = chain_to_dict(chain)
    if checks is not None:
        data["verify"] = {"ok": all(c.status == "ok" for c in checks), "checks": [c.to_dict() for c in checks]}
    return json.dumps(data, indent=2, ensure_ascii=False) + "\n"


# ----------------------------------------------------------------------------
# Verification
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Check:
    """Result of checking one file or record of the chain.

    Attributes
    ----------
    path : str
        Recorded path of the file.
    status : {"ok", "changed", "missing", "stale", "record_missing", "record_inconsistent"}
        ``changed``: current sha256 differs from the recorded one; ``stale``:
        the file's current record has another lineage than the one its
        consumer recorded (remade after use); ``record_missing``: a produced
        file's record is gone; ``record_inconsistent``: a record's hashes do
        not recompute.
    recorded, found : str or None
        Recorded and current value (sha256, or lineage hash for ``stale``).
    used_by : str
        The step that read or wrote the file, e.g. ``fit [2] input bold``.
    detail : str
        One line of explanation.
    """

    path: str
    status: CheckStatus
    recorded: str | None
    found: str | None
    used_by: str
    detail: str = ""

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form."""
        return {"path": self.path, "status": self.status, "recorded": self.recorded, "found": self.found,
                "used_by": self.used_by, "detail": self.detail}


def verify_chain(chain: Chain, current_sha256: ContentHasher, target_sha256: str | None = None) -> list[Check]:
    """Re-hash every file the chain records and compare with the recorded sha256.

    Parameters
    ----------
    chain : Chain
    current_sha256 : callable
        ``current_sha256(recorded_path) -> hex digest or None if missing``;
        called once per distinct path.
    target_sha256 : str, optional
        Current sha256 of the audited output itself; compared with the hash its
        step recorded when it wrote it (``unrecorded`` when the record has
        none, e.g. a JSON output, which is its own sidecar).

    Returns
    -------
    list of Check
        One per (file, consumer) pair, in chain order, plus one per record
        problem (missing, stale or inconsistent record).

    Notes
    -----
    A file passes when ``sha256(current bytes) == recorded sha256`` (SHA-256,
    FIPS 180-4). A produced file is also ``stale`` when the lineage hash in
    its current record differs from the one its consumer recorded: it was
    remade after it was read, so the consumer's output is out of date even if
    the bytes happen to match.
    """
    cache: dict[str, str | None] = {}
    checks: list[Check] = []
    if target_sha256 is not None:
        name = Path(chain.target).name
        recorded = chain.top.output_hashes.get(name)
        made_by = f"{chain.top.step} [{chain.top.number}] output"
        if recorded is None:
            checks.append(Check(chain.target, "unrecorded", None, target_sha256, made_by,
                                "its step recorded no sha256 of it, so an edit to it cannot be seen"))
        elif recorded != target_sha256:
            checks.append(Check(chain.target, "changed", recorded, target_sha256, made_by,
                                "content differs from the one its step wrote"))
        else:
            checks.append(Check(chain.target, "ok", recorded, target_sha256, made_by))
    for node in iter_steps(chain):
        for issue in node.issues:
            checks.append(Check(node.outputs[0], "record_inconsistent", None, None,
                                f"{node.step} [{node.number}]", issue))
        for f in node.inputs:
            used_by = f"{node.step} [{node.number}] input {f.label}"
            if f.path not in cache:
                cache[f.path] = current_sha256(f.path)
            found = cache[f.path]
            if found is None:
                checks.append(Check(f.path, "missing", f.sha256, None, used_by, "file not found"))
            elif found != f.sha256:
                checks.append(Check(f.path, "changed", f.sha256, found, used_by,
                                    "content differs from the one recorded when it was read"))
            else:
                checks.append(Check(f.path, "ok", f.sha256, found, used_by))
            if f.kind == "unresolved":
                checks.append(Check(f.path, "record_missing", f.lineage_hash, None, used_by,
                                    f"made by {f.step} but its provenance record was not found"))
            elif f.producer is not None and f.producer.lineage_hash != f.lineage_hash:
                checks.append(Check(f.path, "stale", f.lineage_hash, f.producer.lineage_hash, used_by,
                                    "remade with other settings or inputs after it was read"))
    return checks


def render_checks(checks: list[Check]) -> str:
    """Verification results as text: every problem on its own line, then a summary line."""
    problems = [c for c in checks if c.status not in ("ok", "unrecorded")]
    lines = [f"NOTE: {c.path}: {c.detail}" for c in checks if c.status == "unrecorded"]
    for c in problems:
        extra = ""
        if c.status in ("changed", "stale"):
            extra = f" (recorded {short_hash(c.recorded)}, now {short_hash(c.found)})"
        lines.append(f"{c.status.upper().replace('_', ' ')}: {c.path}{extra}; {c.detail}; {c.used_by}")
    n_files = len({c.path for c in checks if c.status in ("ok", "changed", "missing")})
    if problems:
        lines.append(f"verify: {len(problems)} problem(s) among {n_files} file(s)")
    else:
        lines.append(f"verify: all {n_files} file(s) match their recorded sha256")
    return "\n".join(lines) + "\n"


# ----------------------------------------------------------------------------
# Diff of two chains
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class SettingDifference:
    """A setting that differs between matching steps of two chains."""

    step: str
    output_a: str
    output_b: str
    key: str
    value_a: Any
    value_b: Any


@dataclass(frozen=True)
class InputDifference:
    """A raw input that differs (path or content) between matching steps."""

    step: str
    output_a: str
    output_b: str
    name: str
    path_a: str
    path_b: str
    sha256_a: str
    sha256_b: str


@dataclass(frozen=True)
class StructureDifference:
    """Chains that cannot be matched further at some point (other steps or inputs)."""

    step: str
    output_a: str
    output_b: str
    detail: str


@dataclass
class ChainDiff:
    """Differences between the lineages of two outputs."""

    target_a: str
    target_b: str
    lineage_a: str
    lineage_b: str
    settings: list[SettingDifference] = field(default_factory=list)
    inputs: list[InputDifference] = field(default_factory=list)
    structure: list[StructureDifference] = field(default_factory=list)

    @property
    def identical(self) -> bool:
        """True when both outputs have the same lineage hash."""
        return self.lineage_a == self.lineage_b


def _same_value(a: Any, b: Any) -> bool:
    return canonical_json([a]) == canonical_json([b])


def diff_chains(a: Chain, b: Chain) -> ChainDiff:
    """Compare two chains step by step, following inputs of the same name.

    Parameters
    ----------
    a, b : Chain

    Returns
    -------
    ChainDiff
        Settings, raw inputs and structural differences; subtrees with equal
        lineage hashes are not descended into (they cannot differ).

    Notes
    -----
    Steps are matched from the top: the two top steps, then the producers of
    inputs with the same name and list position, recursively. Setting values
    are compared by their canonical JSON, so ``1`` and ``1.0`` differ as they
    do in the params hash.
    """
    result = ChainDiff(a.target, b.target, a.top.lineage_hash, b.top.lineage_hash)
    seen: set[tuple[int, int]] = set()

    def walk(na: StepNode, nb: StepNode, out_a: str, out_b: str) -> None:
        if (na.number, nb.number) in seen or na.lineage_hash == nb.lineage_hash:
            return
        seen.add((na.number, nb.number))
        if na.step != nb.step:
            result.structure.append(StructureDifference(na.step, out_a, out_b,
                                                        f"made by step {na.step} in A but {nb.step} in B"))
            return
        if na.params_hash != nb.params_hash:
            fa, fb = flatten_params(na.params), flatten_params(nb.params)
            for key in sorted(set(fa) | set(fb)):
                va, vb = fa.get(key, NOT_SET), fb.get(key, NOT_SET)
                if key not in fa or key not in fb or not _same_value(va, vb):
                    result.settings.append(SettingDifference(na.step, out_a, out_b, key, va, vb))
        ia = {(f.name, f.index): f for f in na.inputs}
        ib = {(f.name, f.index): f for f in nb.inputs}
        for key in list(ia) + [k for k in ib if k not in ia]:
            fa_, fb_ = ia.get(key), ib.get(key)
            if fa_ is None or fb_ is None:
                present = fa_ or fb_
                assert present is not None
                side = "A" if fa_ is not None else "B"
                result.structure.append(StructureDifference(na.step, out_a, out_b,
                                                            f"input {present.label} only in {side} ({present.path})"))
                continue
            if fa_.kind == "raw" and fb_.kind == "raw":
                # the same bytes at another path are the same input: paths never count as a difference
                if fa_.sha256 != fb_.sha256:
                    result.inputs.append(InputDifference(na.step, out_a, out_b, fa_.label, fa_.path, fb_.path,
                                                         fa_.sha256, fb_.sha256))
            elif fa_.lineage_hash == fb_.lineage_hash:
                continue
            elif fa_.producer is not None and fb_.producer is not None:
                walk(fa_.producer, fb_.producer, fa_.path, fb_.path)
            else:
                def what(f: FileNode) -> str:
                    return {"raw": "a raw input", "unresolved": f"made by {f.step} (record not found)",
                            "step": f"made by {f.step}"}[f.kind]
                result.structure.append(StructureDifference(
                    na.step, out_a, out_b, f"input {fa_.label} is {what(fa_)} in A but {what(fb_)} in B"))

    walk(a.top, b.top, a.target, b.target)
    if not result.identical and not (result.settings or result.inputs or result.structure):
        result.structure.append(StructureDifference(
            a.top.step, a.target, b.target,
            "lineage hashes differ but no setting or input difference was found; run audit --verify on both"))
    return result


def _where(step: str, out_a: str, out_b: str) -> str:
    return f"{step} ({out_a})" if out_a == out_b else f"{step} (A: {out_a}; B: {out_b})"


def render_diff_text(diff: ChainDiff) -> str:
    """A diff as text: the verdict, then settings, inputs and structural differences."""
    lines = [f"A: {diff.target_a}  lineage {short_hash(diff.lineage_a)}",
             f"B: {diff.target_b}  lineage {short_hash(diff.lineage_b)}"]
    if diff.identical:
        lines.append("identical lineage")
        return "\n".join(lines) + "\n"
    lines.append("lineage differs")
    if diff.settings:
        lines.append("settings that differ (step, setting: A | B):")
        for s in diff.settings:
            label, _unit = setting_label(s.key)
            name = s.key if label == s.key else f"{s.key} ({label})"
            lines.append(f"    {_where(s.step, s.output_a, s.output_b)}  {name}: "
                         f"{format_value(s.value_a)} | {format_value(s.value_b)}")
    if diff.inputs:
        lines.append("raw inputs that differ (step, input: A | B):")
        for d in diff.inputs:
            lines.append(f"    {_where(d.step, d.output_a, d.output_b)}  {d.name}: "
                         f"{d.path_a} sha256 {short_hash(d.sha256_a)} | {d.path_b} sha256 {short_hash(d.sha256_b)}")
    if diff.structure:
        lines.append("structure:")
        for s in diff.structure:
            lines.append(f"    {_where(s.step, s.output_a, s.output_b)}  {s.detail}")
    return "\n".join(lines) + "\n"


def diff_to_dict(diff: ChainDiff) -> dict[str, Any]:
    """A diff as JSON-ready data (full hashes)."""
    from dataclasses import asdict

    return {"target_a": diff.target_a, "target_b": diff.target_b, "lineage_a": diff.lineage_a,
            "lineage_b": diff.lineage_b, "identical": diff.identical,
            "settings": [asdict(s) for s in diff.settings], "inputs": [asdict(d) for d in diff.inputs],
            "structure": [asdict(s) for s in diff.structure]}


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
