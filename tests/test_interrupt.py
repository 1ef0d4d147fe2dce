"""Interrupting a fit mid-write, then rerunning as the README says, gives the clean run's results (issue 20).

One run of a small invented study goes through the workflow (events, confounds,
design, fit, one contrast). Then the fit is rerun (``--forcerun fit``) and
stopped while it writes ``fit.h5``, twice, with real signals:

- SIGTERM to the fit job (what Snakemake and cluster schedulers send): the job
  stops cleanly (exit 143, "stopped (SIGTERM)" in its log), and no temporary
  file is left even before any rerun;
- then SIGKILL to Snakemake and the job together (a node lost, an
  out-of-memory kill): the temporary stays and so does Snakemake's lock;
  ``snakemake --unlock`` then ``snakemake --rerun-incomplete`` removes it and
  redoes the fit.

The moment is the creation of the fit's temporary file (``.fit.<hex>.tmp.h5``),
seen through Linux inotify (the kernel's file event interface, read with
ctypes), so the signal lands during the write however fast or slow the machine.
After the rerun every map is byte-identical to the clean run's, every sidecar
has the clean run's params, lineage and output hashes, and no ``*.tmp*`` file
is left anywhere under results.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import hashlib
import json
import os
import re
import select
import signal
import struct
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from workflow_helpers import REPO, make_workspace

pytestmark = [pytest.mark.slow,
              pytest.mark.skipif(not sys.platform.startswith("linux"), reason="inotify is Linux's interface")]

RUN = "sub-01/task-beacon_run-1"
TARGETS = [f"results/{RUN}/fit.h5", f"results/{RUN}/contrast-tap/z.nii.gz"]
TEMPORARY = re.compile(r"^\.fit\.[0-9a-f]{8}\.tmp\.h5$")
GRID = (36, 40, 30)
N_VOLUMES = 60
TR_S = 2.0


def write_study(root: Path) -> Path:
    """One subject, one run, the toy config's file names and columns (invented data, fixed seed)."""
    rng = np.random.default_rng(11)
    func, anat = root / "sub-01" / "func", root / "sub-01" / "anat"
    func.mkdir(parents=True)
    anat.mkdir(parents=True)
    stem = "sub-01_task-beacon_run-1"
    events = pd.DataFrame({"onset": [6.0, 30.0, 54.0, 78.0, 96.0], "duration": [8.0, 2.0, 8.0, 2.0, 8.0],
                           "trial_type": ["tap", "flash", "tap", "horn", "flash"]})
    events.to_csv(func / f"{stem}_events.tsv", sep="\t", index=False)
    confounds = pd.DataFrame(rng.normal(0, 0.05, (N_VOLUMES, 4)), columns=["move_x", "move_y", "turn_x",
                                                                           "white_matter_mean"])
    confounds["displacement_mm"] = [np.nan] + list(rng.uniform(0.05, 0.2, N_VOLUMES - 1))
    confounds.to_csv(func / f"{stem}_desc-nuisance_timeseries.tsv", sep="\t", index=False, na_rep="n/a")
    t = np.arange(N_VOLUMES)
    signal_ = ((t // 6) % 2).astype(np.float32)
    data = 600 + rng.normal(0, 6, GRID + (N_VOLUMES,)).astype(np.float32) + 4 * signal_
    img = nib.Nifti1Image(data.astype(np.float32), np.diag([3.0, 3.0, 3.0, 1.0]))
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_zooms((3.0, 3.0, 3.0, TR_S))
    nib.save(img, func / f"{stem}_space-toy_desc-preproc_bold.nii.gz")
    (func / f"{stem}_space-toy_desc-preproc_bold.json").write_text(json.dumps({"RepetitionTime": TR_S}))
    nib.save(nib.Nifti1Image(np.ones(GRID, np.uint8), np.diag([3.0, 3.0, 3.0, 1.0])),
             anat / "sub-01_space-toy_desc-brain_mask.nii.gz")
    (root / "participants.tsv").write_text("participant_id\tsite\nsub-01\ta\n")
    return root


# --------------------------------------------------------------------------- inotify (Linux, via ctypes)

IN_CREATE = 0x00000100
IN_MOVED_TO = 0x00000080
_EVENT = struct.Struct("iIII")


class FileCreations:
    """Names created in one folder, from the kernel's inotify events (inotify(7))."""

    def __init__(self, folder: Path) -> None:
        self._libc = ctypes.CDLL(ctypes.util.find_library("c"), use_errno=True)
        self.fd = self._libc.inotify_init1(os.O_CLOEXEC)
        if self.fd < 0 or self._libc.inotify_add_watch(self.fd, os.fsencode(folder), IN_CREATE | IN_MOVED_TO) < 0:
            raise OSError(ctypes.get_errno(), "inotify")

    def wait_for(self, pattern: re.Pattern[str], timeout_s: float) -> str:
        deadline = time.monotonic() + timeout_s
        while (left := deadline - time.monotonic()) > 0:
            ready, _, _ = select.select([self.fd], [], [], left)
            if not ready:
                break
            buffer = os.read(self.fd, 65536)
            offset = 0
            while offset < len(buffer):
                _, _, _, length = _EVENT.unpack_from(buffer, offset)
                name = buffer[offset + _EVENT.size: offset + _EVENT.size + length].rstrip(b"\0").decode()
                offset += _EVENT.size + length
                if pattern.match(name):
                    return name
        raise AssertionError(f"no file matching {pattern.pattern} appeared within {timeout_s} s")

    def close(self) -> None:
        os.close(self.fd)


# --------------------------------------------------------------------------- running and inspecting

def descendants(pid: int) -> list[int]:
    found, todo = [], [pid]
    while todo:
        parent = todo.pop()
        for task in Path(f"/proc/{parent}/task").glob("*"):
            try:
                children = [int(c) for c in (task / "children").read_text().split()]
            except OSError:
                continue
            found += children
            todo += children
    return found


def fit_job_pid(snakemake_pid: int, timeout_s: float = 120) -> int:
    """The fit job's own process (``python -m glmsteps.launch --direct fit ...``) below Snakemake."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        for pid in descendants(snakemake_pid):
            try:
                argv = Path(f"/proc/{pid}/cmdline").read_bytes().split(b"\0")
            except OSError:
                continue
            if b"glmsteps.launch" in argv and b"fit" in argv and argv[0] != b"/bin/bash" and b"-c" not in argv:
                return pid
        time.sleep(0.02)
    raise AssertionError("the fit job did not start")


def start_snakemake(ws: Any, *args: str) -> subprocess.Popen[str]:
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "Snakefile"), "--directory",
           str(ws.workdir), "--configfile", str(ws.config_path), "--cores", "1", *args]
    return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env=env,
                            start_new_session=True)


def snakemake(ws: Any, *args: str) -> str:
    proc = start_snakemake(ws, *args)
    out, _ = proc.communicate(timeout=300)
    assert proc.returncode == 0, out[-4000:]
    return out


def temporaries(results: Path) -> list[Path]:
    return [p for p in results.rglob("*") if ".tmp" in p.name]


def snapshot(results: Path) -> tuple[dict[str, str], dict[str, dict[str, Any]]]:
    """sha256 of every map and stored fit; params, lineage and output hashes of every sidecar."""
    files = {str(p.relative_to(results)): hashlib.sha256(p.read_bytes()).hexdigest()
             for p in sorted(results.rglob("*")) if p.name.endswith((".nii.gz", ".h5"))}
    hashes = {}
    for side in sorted(results.rglob("*.json")):
        if "logs" in side.parts:
            continue
        data = json.loads(side.read_text())
        holder = data["provenance"] if isinstance(data.get("provenance"), dict) else data
        hashes[str(side.relative_to(results))] = {k: holder.get(k) for k in ("params_hash", "lineage_hash",
                                                                              "output_sha256")}
    return files, hashes


def interrupt_fit(ws: Any, how: signal.Signals) -> subprocess.Popen[str]:
    """Rerun the fit and signal it as it starts writing fit.h5; return the (finished) Snakemake process."""
    watch = FileCreations(ws.results / RUN)
    try:
        proc = start_snakemake(ws, "--forcerun", "fit", *TARGETS)
        pid = fit_job_pid(proc.pid)
        watch.wait_for(TEMPORARY, timeout_s=120)
        if how == signal.SIGKILL:
            os.killpg(proc.pid, signal.SIGKILL)  # Snakemake and its job together
        else:
            os.kill(pid, signal.SIGTERM)         # the job, as a scheduler stops it
        proc.communicate(timeout=120)
    finally:
        watch.close()
    return proc


def test_sigterm_and_sigkill_mid_write_then_rerun_give_the_clean_results(tmp_path: Path) -> None:
    data = write_study(tmp_path / "data")
    ws = make_workspace(tmp_path / "work", data, group_models={})
    ws.config["thresholds"] = {}
    ws.write_config()
    snakemake(ws, *TARGETS)
    clean = snapshot(ws.results)
    assert f"{RUN}/fit.h5" in clean[0] and f"{RUN}/contrast-tap/z.nii.gz" in clean[0]
    inputs = {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in data.rglob("*") if p.is_file()}
    fit_log = ws.results / "logs" / RUN / "fit.log"

    # SIGTERM: a clean stop, nothing left behind even before a rerun
    proc = interrupt_fit(ws, signal.SIGTERM)
    assert proc.returncode != 0
    assert "stopped (SIGTERM)" in fit_log.read_text()
    assert temporaries(ws.results) == []
    assert not (ws.results / RUN / "fit.h5").exists() and not (ws.results / RUN / "fit.json").exists()

    # SIGKILL (of the rerun the SIGTERM stopped): the temporary and Snakemake's lock stay; --unlock, then
    # --rerun-incomplete (one rerun checks both interrupts: each Snakemake start costs seconds)
    proc = interrupt_fit(ws, signal.SIGKILL)
    assert proc.returncode == -signal.SIGKILL
    assert [p.name for p in temporaries(ws.results) if TEMPORARY.match(p.name)] != []
    snakemake(ws, "--unlock", *TARGETS)
    out = snakemake(ws, "--rerun-incomplete", *TARGETS)
    assert "left by an interrupted earlier run" in fit_log.read_text(), out[-3000:]
    assert snapshot(ws.results) == clean
    assert temporaries(ws.results) == []
    assert {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in inputs} == inputs
