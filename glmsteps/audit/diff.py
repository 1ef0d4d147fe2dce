"""Differences between two chains: settings, raw inputs, structure (:func:`diff_chains`).

Part of :mod:`glmsteps.audit` (see its docstring).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from ..provenance import canonical_json
from .chain import Chain, FileNode, NOT_SET, StepNode, short_hash
from .settings_text import flatten_params, format_value, setting_label


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
