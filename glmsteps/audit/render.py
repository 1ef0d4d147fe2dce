"""Text and JSON renderings of a chain: the full chain, the short summary, JSON round trip.

Part of :mod:`glmsteps.audit` (see its docstring).
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from ..provenance import lineage_hash
from .chain import Chain, FileNode, StepNode, iter_steps, raw_inputs, short_hash
from .settings_text import describe_params
from .verify import Check


# ----------------------------------------------------------------------------
# Text and JSON renderings
# ----------------------------------------------------------------------------

def _step_header(node: StepNode) -> str:
    return (f"[{node.number}] {node.step}  params {short_hash(node.params_hash)}  "
            f"lineage {short_hash(node.lineage_hash)}")


def _title_line(chain: Chain) -> str:
    return f"provenance of {chain.target}" + (f"  (paths relative to {chain.root})" if chain.root else "")


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
    lines = [_title_line(chain)]
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
    lines = [_title_line(chain),
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
