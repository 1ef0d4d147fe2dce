"""The end-of-run summary printed in the terminal (called by the Snakefile's ``onsuccess``/``onerror``).

A few lines: maps in the index and how many this run wrote, runs excluded
(with the reason), warnings per step, where ``index.tsv`` and the report are,
and, when the run stopped, the jobs that failed with their one-line error and
log file (Snakemake's own error lines are hidden by the quiet default profile,
and on a cluster a job's error lives only in its log). It reads ``index.tsv``,
the report's sidecar (which counts warnings and exclusions when the report job
ran) and the job logs written since the run started; it never fails the run it
summarises.
"""

from __future__ import annotations

import json
import os
import sys
from collections import defaultdict
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

#: Runs excluded listed by name (the rest are counted).
MAX_LISTED = 5


@dataclass(frozen=True)
class RunSummary:
    """What the summary says.

    Attributes
    ----------
    n_maps : int or None
        Maps in ``index.tsv`` (None when there is no index).
    n_written : int
        Of those, maps written since the run started.
    by_status : dict
        ``ok`` / ``excluded`` / ``skipped`` -> maps.
    excluded_runs : tuple of str
        ``sub-X run: reason``.
    warnings_by_step : dict
        Step -> warnings recorded.
    index, report : str
        Paths (``""`` when missing).
    report_current : bool
        The report is at least as new as the index.
    failed_jobs : tuple of (str, str)
        (log file, its first error line) of each job that failed in this run.
    """

    n_maps: int | None
    n_written: int
    by_status: dict[str, int] = field(default_factory=dict)
    excluded_runs: tuple[str, ...] = ()
    warnings_by_step: dict[str, int] = field(default_factory=dict)
    index: str = ""
    report: str = ""
    report_current: bool = False
    failed_jobs: tuple[tuple[str, str], ...] = ()


def format_run_summary(summary: RunSummary, ok: bool) -> str:
    """The summary as a few lines of text (pure).

    Examples
    --------
    >>> print(format_run_summary(RunSummary(3, 1, {"ok": 3}, index="r/index.tsv"), ok=True), end="")
    glmsteps: finished.
      maps: 3 in r/index.tsv (1 written by this run)
      runs excluded: none
      warnings: none
      report: not built (run `snakemake` without a target to build it)
    """
    lines = ["glmsteps: finished." if ok else "glmsteps: stopped by an error."]
    failed = summary.failed_jobs
    for log, error in failed[:MAX_LISTED]:
        lines.append(f"  failed: {log}: {error}")
    if len(failed) > MAX_LISTED:
        lines.append(f"  failed: and {len(failed) - MAX_LISTED} more jobs (their logs are under the results' logs folder)")
    if not ok and not failed:
        lines.append("  failed: see Snakemake's error above (no job log of this run records an error)")
    if summary.n_maps is None:
        lines.append("  maps: no index.tsv yet")
    else:
        other = {k: v for k, v in summary.by_status.items() if k != "ok" and v}
        extra = f"; {', '.join(f'{v} {k}' for k, v in sorted(other.items()))}" if other else ""
        lines.append(f"  maps: {summary.n_maps} in {summary.index} ({summary.n_written} written by this run{extra})")
    runs = summary.excluded_runs
    if runs:
        shown = "; ".join(runs[:MAX_LISTED]) + (f"; and {len(runs) - MAX_LISTED} more" if len(runs) > MAX_LISTED else "")
        lines.append(f"  runs excluded: {len(runs)} ({shown})")
    else:
        lines.append("  runs excluded: none")
    warned = {k: v for k, v in summary.warnings_by_step.items() if v}
    lines.append("  warnings: " + (", ".join(f"{step} {n}" for step, n in sorted(warned.items())) + " (in the sidecars"
                                   + (" and the report)" if summary.report else ")") if warned else "none"))
    if summary.report:
        state = "" if summary.report_current else " (older than the index: rerun to update it)"
        lines.append(f"  report: {summary.report}{state}  (open it in a browser: file://{os.path.abspath(summary.report)})")
    else:
        lines.append("  report: not built (run `snakemake` without a target to build it)")
    return "\n".join(lines) + "\n"


def _index_counts(index: Path, started: float) -> tuple[int, int, dict[str, int], list[str], dict[str, int]]:
    n = written = 0
    by_status: dict[str, int] = defaultdict(int)
    excluded: dict[tuple[str, str, str, str], str] = {}
    warnings: dict[str, int] = defaultdict(int)
    seen_jobs: set[str] = set()
    with open(index, encoding="utf-8") as handle:
        header = handle.readline().rstrip("\n").split("\t")
        col = {name: i for i, name in enumerate(header)}
        for line in handle:
            cells = line.rstrip("\n").split("\t")
            if len(cells) != len(header):
                continue
            get = lambda k: cells[col[k]] if k in col else ""  # noqa: E731
            n += 1
            status = get("status") or "ok"
            by_status[status] += 1
            path = index.parent / get("path")
            try:
                if path.stat().st_mtime >= started:
                    written += 1
            except OSError:
                pass
            if status == "excluded" and get("level") == "run":
                key = (get("subject"), get("session"), get("task"), get("run"))
                excluded.setdefault(key, "")
            job = get("lineage_hash")
            if job and job not in seen_jobs:
                seen_jobs.add(job)
                record = _read(path)
                for _ in record.get("warnings") or []:
                    warnings[str(record.get("step", "?"))] += 1
    runs = [f"sub-{subject} {'ses-' + session + ' ' if session and session != 'n/a' else ''}task-{task} run-{run}"
            for (subject, session, task, run) in sorted(excluded)]
    return n, written, dict(by_status), runs, dict(warnings)


#: How a job log marks its error (``glmsteps.jobs.common``'s log format: time, level, message).
ERROR_MARK = " ERROR "


def find_failed_jobs(log_dir: str | os.PathLike[str], started: float) -> list[tuple[str, str]]:
    """Job logs written since ``started`` that record an error, with their first error line.

    Parameters
    ----------
    log_dir : path-like
        The workflow's log folder (``<output_dir>/logs``).
    started : float
        Start of the run (seconds since the epoch).

    Returns
    -------
    list of (str, str)
        (log path, the message of its first ``ERROR`` line), sorted by path.
    """
    found = []
    root = Path(log_dir)
    if not root.is_dir():
        return found
    for log in sorted(root.rglob("*.log")):
        try:
            if log.stat().st_mtime < started:
                continue
            with open(log, encoding="utf-8", errors="replace") as handle:
                for line in handle:
                    if ERROR_MARK in line:
                        found.append((os.fspath(log), line.split(ERROR_MARK, 1)[1].strip()))
                        break
        except OSError:
            continue
    return found


def _read(map_path: Path) -> dict[str, Any]:
    from ..provenance import sidecar_path

    try:
        with open(sidecar_path(map_path), encoding="utf-8") as handle:
            data = json.load(handle)
    except (OSError, json.JSONDecodeError):
        return {}
    return data.get("provenance", data) if isinstance(data, dict) else {}


def collect_run_summary(output_dir: str | os.PathLike[str], started: float) -> RunSummary:
    """Read the summary's facts from ``index.tsv`` and the report's sidecar.

    Parameters
    ----------
    output_dir : path-like
        The workflow's output folder.
    started : float
        Start of the run (seconds since the epoch, as ``time.time()``).
    """
    out = Path(output_dir)
    index = out / "index.tsv"
    report = out / "report" / "index.html"
    failed = tuple(find_failed_jobs(out / "logs", started))
    if not index.is_file():
        return RunSummary(None, 0, report=os.fspath(report) if report.is_file() else "", failed_jobs=failed)
    n, written, by_status, excluded, warnings = _index_counts(index, started)
    current = report.is_file() and report.stat().st_mtime >= index.stat().st_mtime
    facts: Mapping[str, Any] = _read(report) if current else {}
    if facts.get("excluded_runs") is not None:
        excluded = [str(x) for x in facts["excluded_runs"]]
    if isinstance(facts.get("warnings_by_step"), Mapping):
        warnings = {str(k): int(v) for k, v in facts["warnings_by_step"].items()}
    return RunSummary(n, written, by_status, tuple(excluded), warnings, os.fspath(index),
                      os.fspath(report) if report.is_file() else "", bool(current), failed)


def print_run_summary(output_dir: str | os.PathLike[str], started: float, ok: bool = True,
                      stream: TextIO | None = None) -> None:
    """Print the end-of-run summary; a problem reading the results prints one line instead of failing."""
    stream = stream or sys.stdout
    try:
        text = format_run_summary(collect_run_summary(output_dir, started), ok)
    except Exception as exc:  # never turn a finished run into a failed one
        text = f"glmsteps: {'finished' if ok else 'stopped by an error'}; no summary ({exc})\n"
    stream.write(text)
    stream.flush()
