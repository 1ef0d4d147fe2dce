"""Shared glue between a Snakemake script and a step's ``run`` function."""

from __future__ import annotations

import logging
import os
import re
import signal
import sys
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path
from types import FrameType
from typing import Any, Protocol

from ..errors import GlmstepsError

JobFunction = Callable[..., None]


def process_start_time() -> float:
    """When this job's process started (seconds since the epoch).

    The launcher's client sets ``glmsteps.launch.PROCESS_START_VARIABLE`` to its own start (the job's
    process as Snakemake sees it); otherwise the start of this process from ``/proc``, or
    now when ``/proc`` is not there.
    """
    from ..launch import PROCESS_START_VARIABLE, own_start_time

    handed = os.environ.pop(PROCESS_START_VARIABLE, "")
    if handed:
        try:
            return float(handed)
        except ValueError:
            pass
    return own_start_time()


class SnakemakeLike(Protocol):
    """The attributes of the ``snakemake`` object a script receives."""

    input: Any
    output: Any
    params: Any
    wildcards: Any
    log: Any
    threads: int


def _named(items: Any) -> dict[str, Any]:
    """Snakemake's named input/output/params as a plain dict (lists kept)."""
    if isinstance(items, Mapping):
        return {k: _plain(v) for k, v in items.items()}
    keys = list(getattr(items, "keys", lambda: [])())
    return {k: _plain(getattr(items, k)) for k in keys}


def _plain(value: Any) -> Any:
    if isinstance(value, str):
        return str(value)
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


def setup_logging(log_path: str | None) -> logging.Logger:
    """Log to the job's log file with timestamps; warnings and errors go to stderr as well.

    With a log file, stderr (Snakemake's terminal) gets only warnings and
    errors, so a study's hundreds of jobs do not fill it with progress lines;
    without one, stderr gets everything.
    """
    logger = logging.getLogger("glmsteps")
    logger.handlers.clear()
    logger.setLevel(logging.INFO)
    fmt = logging.Formatter("%(asctime)s %(levelname)s %(message)s")
    terminal = logging.StreamHandler(sys.stderr)
    terminal.setLevel(logging.WARNING if log_path else logging.INFO)
    handlers: list[logging.Handler] = [terminal]
    if log_path:
        Path(log_path).parent.mkdir(parents=True, exist_ok=True)
        handlers.append(logging.FileHandler(log_path, mode="w", encoding="utf-8"))
    for h in handlers:
        h.setFormatter(fmt)
        logger.addHandler(h)
    return logger


class JobInterrupted(BaseException):
    """Raised inside a job when it receives SIGTERM (Snakemake's or a cluster's stop).

    A ``BaseException``, like ``KeyboardInterrupt``, so that no ``except
    Exception`` of a job swallows it; every ``fileio.atomic_path`` block it passes
    through removes its temporary file.
    """


def _raise_interrupted(signum: int, frame: FrameType | None) -> None:
    raise JobInterrupted(f"signal {signum}")


def output_paths(outputs: Mapping[str, Any]) -> list[Path]:
    """Every path among a job's named outputs (lists flattened)."""
    paths: list[Path] = []
    for value in outputs.values():
        for item in ([value] if isinstance(value, (str, os.PathLike)) else value):
            paths.append(Path(item))
    return paths


def _temporaries_of(path: Path) -> Iterator[Path]:
    """Temporary files ``fileio.atomic_path`` may have left for ``path`` (``.<stem>.<hex>.tmp<ext>``)."""
    from ..fileio import split_extension

    stem, ext = split_extension(path.name)
    pattern = re.compile(rf"^\.{re.escape(stem)}\.[0-9a-f]{{8}}\.tmp{re.escape(ext)}$")
    if path.parent.is_dir():
        for entry in path.parent.iterdir():
            if pattern.match(entry.name):
                yield entry


def _owned_files(outputs: Sequence[Path]) -> list[Path]:
    """The outputs, their sidecars, and the temporaries of both."""
    from ..provenance import sidecar_path

    files: list[Path] = []
    for path in outputs:
        for own in dict.fromkeys([path, sidecar_path(path)]):
            files.append(own)
            files.extend(_temporaries_of(own))
    return files


def remove_stale_files(outputs: Sequence[Path]) -> list[Path]:
    """Remove what an earlier, killed run of this job left: temporaries, and sidecars of absent outputs.

    Snakemake removes a job's outputs before running it, but not files it does
    not know of: the hidden temporaries of an interrupted atomic write, or a
    sidecar written before its output. Returns the removed paths.
    """
    from ..provenance import sidecar_path

    removed = []
    declared = {p.resolve() for p in outputs}
    for path in outputs:
        side = sidecar_path(path)
        for stale in (*_temporaries_of(path), *_temporaries_of(side)):
            stale.unlink(missing_ok=True)
            removed.append(stale)
        if side.resolve() not in declared and side.exists() and not path.exists():
            side.unlink()
            removed.append(side)
    return removed


def discard_outputs(outputs: Sequence[Path]) -> None:
    """Remove a failed job's outputs, their sidecars and temporaries, so nothing partial stays."""
    for path in _owned_files(outputs):
        path.unlink(missing_ok=True)


def run_script(job: JobFunction, smk: SnakemakeLike) -> None:
    """Run a step from a Snakemake script; user errors become one line and exit 1.

    Before the job: the temporaries and orphan sidecars an earlier, killed run
    of it left are removed. While it runs, sidecars are held back and written
    after all its outputs, each with the sha256 of the outputs it describes
    (``glmsteps audit --verify`` checks it). SIGTERM (Snakemake stopping, a
    cluster cancelling the job) becomes a clean stop: the job exits with 143.
    On any failure the outputs written so far, their sidecars and temporaries
    are removed, so nothing partial stays.

    Parameters
    ----------
    job : callable
        A step's ``run(inputs, outputs, params, wildcards, threads)``.
    smk : the ``snakemake`` object of the script.
    """
    from ..provenance import deferred_sidecars, write_deferred_sidecars

    process_start = process_start_time()
    log_files = list(getattr(smk, "log", []) or [])
    logger = setup_logging(str(log_files[0]) if log_files else None)
    start = time.perf_counter()
    params = _named(smk.params)
    if set(params) == {"settings"}:
        # rules whose params depend on wildcards pass them as one mapping named `settings`
        params = dict(params["settings"])
    outputs = _named(smk.output)
    paths = output_paths(outputs)
    for stale in remove_stale_files(paths):
        logger.info("removed %s, left by an interrupted earlier run", stale)
    previous = signal.signal(signal.SIGTERM, _raise_interrupted)
    try:
        with deferred_sidecars() as pending:
            body_start = time.time()
            job(inputs=_named(smk.input), outputs=outputs, params=params,
                wildcards=_named(smk.wildcards), threads=int(getattr(smk, "threads", 1) or 1))
            write_deferred_sidecars(pending, paths)
            body_end = time.time()
    except GlmstepsError as exc:
        logger.error("%s: %s", type(exc).__name__, exc)
        discard_outputs(paths)
        sys.exit(1)
    except (JobInterrupted, KeyboardInterrupt) as exc:
        logger.error("stopped (%s); the job's partial outputs and temporary files were removed",
                     "SIGTERM" if isinstance(exc, JobInterrupted) else "interrupted")
        discard_outputs(paths)
        sys.exit(143 if isinstance(exc, JobInterrupted) else 130)
    except Exception:
        # not a user error: keep the whole traceback in the step's log, then fail
        logger.exception("unexpected error (a bug in glmsteps; please report it with this log)")
        discard_outputs(paths)
        raise
    finally:
        signal.signal(signal.SIGTERM, previous)
    logger.info("done in %.2f s", time.perf_counter() - start)
    # read by tests/benchmarks/bench_workflow.py: start-up overhead and body of every job
    logger.info("timing: process_start=%.3f body_start=%.3f body_end=%.3f (start-up %.3f s, body %.3f s)",
                process_start, body_start, body_end, body_start - process_start, body_end - body_start)
