"""Verification of a chain against the files' current hashes (:func:`verify_chain`).

Part of :mod:`glmsteps.audit` (see its docstring).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .chain import Chain, CheckStatus, ContentHasher, iter_steps, short_hash


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
