"""The warm launcher of the light steps (glmsteps.launch).

Reference for the command line: Snakemake itself, which formats the rule's shell template;
for the results: the same job run in-process (a warm run must write identical bytes).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from glmsteps import launch, provenance
from glmsteps.fileio import save_nifti

REPO = Path(__file__).resolve().parents[1]


def _wait_for(predicate, timeout_s: float = 60.0, what: str = "") -> None:
    deadline = time.monotonic() + timeout_s
    while not predicate():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.05)


@pytest.mark.slow
def test_command_line_is_read_back_exactly_as_snakemake_formats_it(tmp_path):
    """Named inputs (one a list), outputs, params (nested, quotes, spaces), wildcards and log."""
    capture = tmp_path / "argv.json"
    recorder = tmp_path / "record_argv.py"
    recorder.write_text(f"import sys, json\njson.dump(sys.argv[1:], open({str(capture)!r}, 'w'))\n")
    (tmp_path / "Snakefile").write_text(textwrap.dedent(f"""
        from glmsteps.launch import command_template
        rule all:
            input: "o/sub-01/task-a_run-1/x y.txt"
        rule one:
            input: a="Snakefile", b=["Snakefile", "Snakefile"]
            output: x="o/sub-{{subject}}/{{run_id}}/x y.txt"
            params: settings={{"a": 1, "b": [True, None, "x y"], "c": {{"d": 2.5}}, "e": "it's"}}
            log: "logs/{{subject}}/{{run_id}}.log"
            shell: command_template("index").replace("-m glmsteps.launch", {str(recorder)!r}) + " && touch {{output.x:q}}"
    """))
    env = dict(os.environ, PYTHONPATH=str(REPO))
    subprocess.run([sys.executable, "-m", "snakemake", "--cores", "1", "-q"], cwd=tmp_path, env=env, check=True,
                   capture_output=True)
    request = launch.parse_request(json.loads(capture.read_text()))
    assert request.step == "index" and request.threads == 1
    assert request.inputs == {"a": "Snakefile", "b": ["Snakefile", "Snakefile"]}
    assert request.outputs == {"x": "o/sub-01/task-a_run-1/x y.txt"}
    assert request.params == {"settings": {"a": 1, "b": [True, None, "x y"], "c": {"d": 2.5}, "e": "it's"}}
    assert request.wildcards == {"subject": "01", "run_id": "task-a_run-1"}
    assert request.log == "logs/01/task-a_run-1.log"


def _maps(folder: Path) -> list[str]:
    """Two statistical maps with sidecars, as the contrast step writes them."""
    raw = folder / "raw.txt"
    raw.parent.mkdir(parents=True, exist_ok=True)
    raw.write_text("raw\n")
    record = provenance.build_record("contrast", {"name": "a"}, {"fit": str(raw)})
    paths = []
    for stat in ("t", "z"):
        path = folder / "sub-01" / "contrast-a" / f"{stat}.nii.gz"
        provenance.write_sidecar(path, record, map={"level": "run", "subject": "01", "session": "", "task": "a",
                                                     "run": "1", "contrast": "a", "stat": stat})
        save_nifti(path, np.full((2, 2, 2), 1.0), np.eye(4))
        paths.append(str(path))
    return paths


def _request(maps: list[str], out: Path) -> launch.JobRequest:
    return launch.JobRequest(step="index", inputs={"maps": maps}, outputs={"index": str(out / "index.tsv")},
                             params={}, wildcards={}, log=str(out / "index.log"), threads=1, cwd=os.getcwd(),
                             env=dict(os.environ))


def _server(tmp_path: Path, extra_path: str = "", setup: str = "") -> tuple[subprocess.Popen, Path, dict]:
    env = dict(os.environ, XDG_RUNTIME_DIR=str(tmp_path / "run"), GLMSTEPS_LAUNCH="warm",
               PYTHONPATH=os.pathsep.join(p for p in (str(REPO), extra_path) if p))
    (tmp_path / "run").mkdir(exist_ok=True)
    code = f"import sys\nfrom glmsteps import launch\n{setup}\nlaunch.serve(launch.socket_path())\n"
    proc = subprocess.Popen([sys.executable, "-c", code], env=env)
    old = os.environ.get("XDG_RUNTIME_DIR")
    os.environ["XDG_RUNTIME_DIR"] = str(tmp_path / "run")
    try:
        path = launch.socket_path()
    finally:
        if old is None:
            del os.environ["XDG_RUNTIME_DIR"]
        else:
            os.environ["XDG_RUNTIME_DIR"] = old
    _wait_for(path.exists, what="the server's socket")
    return proc, path, env


@pytest.mark.slow
def test_a_warm_run_writes_the_same_bytes_as_an_in_process_run(tmp_path):
    maps = _maps(tmp_path / "results")
    cold, warm = tmp_path / "cold", tmp_path / "warm"
    assert launch.run_in_process(_request(maps, cold)) == 0
    proc, path, _ = _server(tmp_path)
    try:
        assert launch.run_warm(_request(maps, warm), path) == 0
        for name in ("index.tsv", "index.json"):
            assert (warm / name).read_bytes() == (cold / name).read_bytes(), name
        assert "done in" in (warm / "index.log").read_text()
    finally:
        proc.terminate()
        proc.wait(timeout=30)
    assert launch.run_warm(_request(maps, warm), path) is None   # no server: the caller runs the job itself


SLEEPY = textwrap.dedent('''
    """A test-only step: writes one output slowly."""
    import time
    from pathlib import Path
    from glmsteps import provenance
    from glmsteps.fileio import atomic_path

    def run(inputs, outputs, params, wildcards, threads=1):
        provenance.write_sidecar(outputs["out"], provenance.build_record("sleepy", {}, {}))
        with atomic_path(outputs["out"]) as tmp:
            tmp.write_text("half")
            Path(outputs["out"] + ".started").write_text(str(__import__("os").getpid()))
            time.sleep(120)
''')


def _client(tmp_path: Path, env: dict, out: Path) -> subprocess.Popen:
    code = textwrap.dedent(f"""
        import sys
        from glmsteps import launch
        launch.STEP_MODULES["sleepy"] = "sleepy_step"
        sys.exit(launch.main(["sleepy", "1", "{{}}", "{{'out': (0, None)}}", "{{}}", ":::", ":::", {str(out)!r},
                              ":::", ":::", ":::"]))
    """)
    return subprocess.Popen([sys.executable, "-c", code], env=env, stderr=subprocess.PIPE, text=True)


@pytest.mark.slow
@pytest.mark.parametrize("how", ["sigterm", "sigkill"])
def test_stopping_the_client_stops_its_job_and_leaves_nothing(tmp_path, how):
    """SIGTERM to the client is forwarded to the job; a SIGKILLed client's job is stopped by the server."""
    (tmp_path / "mods").mkdir()
    (tmp_path / "mods" / "sleepy_step.py").write_text(SLEEPY)
    proc, path, env = _server(tmp_path, str(tmp_path / "mods"), 'launch.STEP_MODULES["sleepy"] = "sleepy_step"')
    out = tmp_path / "out" / "slow.txt"
    try:
        client = _client(tmp_path, env, out)
        started = Path(str(out) + ".started")
        _wait_for(started.exists, what="the job to start")
        job_pid = int(started.read_text())
        assert job_pid != client.pid    # the job runs in a child of the server, not in the client
        started.unlink()
        client.send_signal(signal.SIGTERM if how == "sigterm" else signal.SIGKILL)
        client.wait(timeout=60)
        if how == "sigterm":
            assert client.returncode == 143, client.stderr.read()
        _wait_for(lambda: not Path(f"/proc/{job_pid}").exists() or
                  Path(f"/proc/{job_pid}/stat").read_text().split()[2] == "Z", what="the job to stop")
        _wait_for(lambda: not any((tmp_path / "out").iterdir()), timeout_s=30, what="partial outputs to go")
    finally:
        proc.terminate()
        proc.wait(timeout=30)


def test_warm_mode_is_off_inside_slurm_and_when_asked(monkeypatch):
    monkeypatch.delenv("GLMSTEPS_LAUNCH", raising=False)
    monkeypatch.delenv("SLURM_JOB_ID", raising=False)
    assert launch.warm_enabled()
    monkeypatch.setenv("SLURM_JOB_ID", "12")
    assert not launch.warm_enabled()
    monkeypatch.setenv("GLMSTEPS_LAUNCH", "warm")
    assert launch.warm_enabled()
    monkeypatch.setenv("GLMSTEPS_LAUNCH", "direct")
    assert not launch.warm_enabled()


def test_a_malformed_command_line_is_named():
    with pytest.raises(launch.LaunchError, match="malformed"):
        launch.parse_request(["index", "1", "{}", "{}"])
    with pytest.raises(launch.LaunchError, match="unknown step"):
        launch.command_template("no_such_step")
