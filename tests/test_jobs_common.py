"""The job runner every workflow step goes through (glmsteps.jobs.common.run_script).

Checks what issue 20 asks of it: sidecars written only after their outputs and carrying the
outputs' sha256, nothing partial left by a failed or stopped job, stale temporaries of an
earlier killed run removed, warnings in the job's log even when the job fails.
"""

from __future__ import annotations

import hashlib
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
import warnings
from pathlib import Path
from types import SimpleNamespace

import pytest

from glmsteps import provenance
from glmsteps.errors import DataError, GlmstepsWarning
from glmsteps.fileio import atomic_path, write_text
from glmsteps.jobs.common import run_script


def _smk(tmp_path: Path, **outputs: str) -> SimpleNamespace:
    return SimpleNamespace(input={}, output={k: str(tmp_path / v) for k, v in outputs.items()},
                           params={"k": 1}, wildcards={}, log=[str(tmp_path / "job.log")], threads=1)


def _write_two(outputs, fail_after_first=False):
    record = provenance.build_record("demo", {"k": 1}, {})
    for i, key in enumerate(("a", "b")):
        side = provenance.write_sidecar(outputs[key], record, map={"stat": key})
        assert not side.exists(), "a sidecar must not be written before its output"
        write_text(outputs[key], f"output {key}\n")
        if fail_after_first:
            warnings.warn("half-way warning", GlmstepsWarning, stacklevel=1)
            raise DataError(f"{outputs[key]}: made-up failure after the first output; fix nothing")


def test_sidecars_follow_their_outputs_and_carry_their_sha256(tmp_path):
    smk = _smk(tmp_path, a="out/a.txt", b="out/b.txt")

    def job(inputs, outputs, params, wildcards, threads):
        with provenance.collect_warnings():
            _write_two(outputs)

    run_script(job, smk)
    for key in ("a", "b"):
        out = Path(smk.output[key])
        side = json.loads(provenance.sidecar_path(out).read_text())
        # reference: hashlib sha256 of the written bytes
        assert side[provenance.OUTPUT_HASHES_KEY] == {out.name: hashlib.sha256(out.read_bytes()).hexdigest()}
        assert provenance.sidecar_path(out).stat().st_mtime_ns >= out.stat().st_mtime_ns


def test_a_failing_job_leaves_nothing_and_logs_its_warnings(tmp_path):
    smk = _smk(tmp_path, a="out/a.txt", b="out/b.txt")

    def job(inputs, outputs, params, wildcards, threads):
        with provenance.collect_warnings():
            _write_two(outputs, fail_after_first=True)

    with pytest.raises(SystemExit) as info:
        run_script(job, smk)
    assert info.value.code == 1
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == []
    log = (tmp_path / "job.log").read_text()
    assert "GlmstepsWarning: half-way warning" in log and "DataError" in log
    assert log.index("half-way warning") < log.index("DataError")


def test_stale_temporaries_and_orphan_sidecars_are_removed_before_the_job(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    stale = [out / ".a.0123abcd.tmp.txt", out / ".a.fedc9876.tmp.json", out / "b.json"]
    for path in stale:
        path.write_text("left by a killed run\n")
    unrelated = [out / ".c.0123abcd.tmp.txt", out / "notes.json"]
    for path in unrelated:
        path.write_text("not this job's\n")
    smk = _smk(tmp_path, a="out/a.txt", b="out/b.txt")
    run_script(lambda inputs, outputs, params, wildcards, threads: _write_two(outputs), smk)
    assert not any(p.exists() for p in stale[:2])
    assert json.loads((out / "b.json").read_text())["step"] == "demo"   # the orphan was replaced by the real one
    assert all(p.exists() for p in unrelated)


@pytest.mark.slow
def test_sigterm_during_a_write_is_a_clean_stop(tmp_path):
    """SIGTERM (Snakemake stopping a job) while an output is half written: exit 143, nothing left."""
    script = tmp_path / "job.py"
    script.write_text(textwrap.dedent(f"""
        import sys, time
        from pathlib import Path
        from types import SimpleNamespace
        from glmsteps import provenance
        from glmsteps.fileio import atomic_path, write_text
        from glmsteps.jobs.common import run_script

        def job(inputs, outputs, params, wildcards, threads):
            record = provenance.build_record("demo", {{}}, {{}})
            provenance.write_sidecar(outputs["a"], record)
            write_text(outputs["a"], "first\\n")
            provenance.write_sidecar(outputs["b"], record)
            with atomic_path(outputs["b"]) as tmp:
                tmp.write_text("half")
                Path("{tmp_path / 'ready'}").write_text("now")
                time.sleep(60)

        out = Path("{tmp_path / 'out'}")
        run_script(job, SimpleNamespace(input={{}}, output={{"a": str(out / "a.txt"), "b": str(out / "b.txt")}},
                                        params={{}}, wildcards={{}}, log=[], threads=1))
    """))
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    proc = subprocess.Popen([sys.executable, str(script)], env=env, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while not (tmp_path / "ready").exists():
        assert proc.poll() is None and time.monotonic() < deadline, proc.stderr.read()
        time.sleep(0.05)
    assert any(p.name.startswith(".b.") for p in (tmp_path / "out").iterdir())   # mid-write
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 143, err
    assert "stopped (SIGTERM)" in err
    assert list((tmp_path / "out").iterdir()) == []
