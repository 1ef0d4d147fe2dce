"""Helpers for tests that run Snakemake on the toy study in a temporary folder."""

from __future__ import annotations

import os
import re
import subprocess
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

REPO = Path(__file__).resolve().parents[1]


@dataclass
class Workspace:
    """A working folder with a config pointing at a toy dataset."""

    workdir: Path
    data: Path
    config: dict[str, Any]

    @property
    def config_path(self) -> Path:
        return self.workdir / "config.yaml"

    @property
    def results(self) -> Path:
        return self.workdir / self.config["output_dir"]

    def write_config(self) -> None:
        self.config_path.write_text(yaml.safe_dump(self.config, sort_keys=False))

    def snakemake(self, *args: str, check: bool = True, timeout: float = 1800,
                  config: dict[str, Any] | None = None) -> subprocess.CompletedProcess[str]:
        """Run Snakemake on this workspace with the repository's Snakefile.

        ``config`` (optional) is written to a separate file and used instead of the
        workspace's own, so a test can try an edited config without changing it.
        """
        config_path = self.config_path
        if config is not None:
            config_path = self.workdir / "edited_config.yaml"
            config_path.write_text(yaml.safe_dump(config, sort_keys=False))
        env = dict(os.environ)
        env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
        if ("--dry-run" in args or "-n" in args) and "--quiet" not in args:
            # the default profile hides per-job lines (profiles/default); a plan is read from them
            args = (*args, "--quiet", "host")
        cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "Snakefile"), "--directory",
               str(self.workdir), "--configfile", str(config_path), *args]
        proc = _run_with_progress(cmd, env, timeout, show="--dry-run" not in args and "-n" not in args)
        if check and proc.returncode != 0:
            raise AssertionError(f"snakemake failed ({proc.returncode}):\n{proc.stdout[-4000:]}\n{proc.stderr[-6000:]}")
        return proc


_PROGRESS = re.compile(r"^\d+ of \d+ steps \(\d+%\) done$")


def _run_with_progress(cmd: list[str], env: dict[str, str], timeout: float,
                       show: bool) -> subprocess.CompletedProcess[str]:
    """Run ``cmd`` capturing its output; with ``show``, echo Snakemake's progress lines to the terminal.

    A whole workflow run takes minutes; its "N of M steps (x%) done" lines go to the real
    stderr (``sys.__stderr__``, past pytest's capture) so a long test is not silent.
    """
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    chunks: dict[str, list[str]] = {"out": [], "err": []}
    started = time.monotonic()

    def pump(stream: Any, key: str) -> None:
        for line in stream:
            chunks[key].append(line)
            if show and _PROGRESS.match(line.strip()) and sys.__stderr__ is not None:
                sys.__stderr__.write(f"  [snakemake {time.monotonic() - started:6.1f} s] {line.strip()}\n")
                sys.__stderr__.flush()

    threads = [threading.Thread(target=pump, args=(proc.stdout, "out")),
               threading.Thread(target=pump, args=(proc.stderr, "err"))]
    for t in threads:
        t.start()
    try:
        proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        raise
    finally:
        for t in threads:
            t.join()
    return subprocess.CompletedProcess(cmd, proc.returncode, "".join(chunks["out"]), "".join(chunks["err"]))


def default_config() -> dict[str, Any]:
    """The repository's toy config as a dict."""
    return yaml.safe_load((REPO / "config" / "config.yaml").read_text())


def make_workspace(base: Path, data: Path, **overrides: Any) -> Workspace:
    """A workspace under ``base`` analysing ``data`` with the toy config (plus overrides)."""
    base.mkdir(parents=True, exist_ok=True)
    config = default_config()
    config["inputs"]["root"] = str(data)
    config.update(overrides)
    ws = Workspace(workdir=base, data=data, config=config)
    ws.write_config()
    return ws


_JOB = re.compile(r"^(?:local)?rule (\S+):$")
_WILDCARDS = re.compile(r"^wildcards: (.*)$")


def planned_jobs(dry_run_output: str) -> list[tuple[str, dict[str, str]]]:
    """(rule, wildcards) of every job a dry run would execute (grouped jobs included).

    Jobs of a group are printed indented under ``group job ...``; indentation is ignored.
    """
    jobs: list[tuple[str, dict[str, str]]] = []
    for raw in dry_run_output.splitlines():
        line = raw.strip()
        m = _JOB.match(line)
        if m:
            jobs.append((m.group(1), {}))
            continue
        w = _WILDCARDS.match(line)
        if w and jobs:
            jobs[-1] = (jobs[-1][0], dict(kv.split("=", 1) for kv in w.group(1).split(", ")))
    return jobs
