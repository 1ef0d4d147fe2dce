"""Shared glue between a Snakemake script and a step's ``run`` function."""

from __future__ import annotations

import logging
import sys
import time
from collections.abc import Callable, Mapping
from typing import Any, Protocol

from ..errors import GlmstepsError

JobFunction = Callable[..., None]


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
    """Log to the job's log file (and stderr) with timestamps."""
    logger = logging.getLogger("glmsteps")
    logger.handlers.clear()
    logger.setLevel(logging.INFO)
    fmt = logging.Formatter("%(asctime)s %(levelname)s %(message)s")
    handlers: list[logging.Handler] = [logging.StreamHandler(sys.stderr)]
    if log_path:
        handlers.append(logging.FileHandler(log_path, mode="w", encoding="utf-8"))
    for h in handlers:
        h.setFormatter(fmt)
        logger.addHandler(h)
    return logger


def run_script(job: JobFunction, smk: SnakemakeLike) -> None:
    """Run a step from a Snakemake script; user errors become one line and exit 1.

    Parameters
    ----------
    job : callable
        A step's ``run(inputs, outputs, params, wildcards, threads)``.
    smk : the ``snakemake`` object of the script.
    """
    log_files = list(getattr(smk, "log", []) or [])
    logger = setup_logging(str(log_files[0]) if log_files else None)
    start = time.perf_counter()
    params = _named(smk.params)
    if set(params) == {"settings"}:
        # rules whose params depend on wildcards pass them as one mapping named `settings`
        params = dict(params["settings"])
    try:
        job(inputs=_named(smk.input), outputs=_named(smk.output), params=params,
            wildcards=_named(smk.wildcards), threads=int(getattr(smk, "threads", 1) or 1))
    except GlmstepsError as exc:
        logger.error("%s: %s", type(exc).__name__, exc)
        sys.exit(1)
    except Exception:
        # not a user error: keep the whole traceback in the step's log, then fail
        logger.exception("unexpected error (a bug in glmsteps; please report it with this log)")
        raise
    logger.info("done in %.2f s", time.perf_counter() - start)
