"""Tests of the ``glmsteps`` console script: argument parsing, version, exit codes.

The audit and diff commands are exercised on real provenance chains in
``tests/test_audit.py``; here only the command layer is checked.
"""

from __future__ import annotations

import subprocess
import sys
import tomllib
import types
from pathlib import Path
from typing import Any

import pytest

from glmsteps import cli

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture
def fake_toystudy(monkeypatch: pytest.MonkeyPatch) -> list[tuple[tuple[Any, ...], dict[str, Any]]]:
    """Stand-in for glmsteps.toystudy that records how it was called."""
    calls: list[tuple[tuple[Any, ...], dict[str, Any]]] = []

    def write_toy_study(*args: Any, **kwargs: Any) -> Path:
        calls.append((args, kwargs))
        return Path(args[0]) / "study"

    module = types.ModuleType("glmsteps.toystudy")
    module.write_toy_study = write_toy_study  # type: ignore[attr-defined]
    monkeypatch.setitem(sys.modules, "glmsteps.toystudy", module)
    return calls


def test_version_matches_the_package_metadata(capsys: pytest.CaptureFixture[str]) -> None:
    # reference: the installed distribution's metadata (importlib.metadata), which setuptools
    # takes from glmsteps.__version__ as pyproject.toml declares (dynamic version, one place)
    from importlib.metadata import version

    project = tomllib.loads((REPO / "pyproject.toml").read_text())
    assert project["project"]["dynamic"] == ["version"]
    assert project["tool"]["setuptools"]["dynamic"]["version"] == {"attr": "glmsteps.__version__"}
    declared = version("glmsteps")
    with pytest.raises(SystemExit) as stop:
        cli.main(["--version"])
    assert stop.value.code == 0
    assert capsys.readouterr().out == f"glmsteps {declared}\n"


def test_toy_study_passes_folder_and_seed(fake_toystudy: list, tmp_path: Path,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["toy-study", str(tmp_path / "toy"), "--seed", "17"]) == 0
    assert fake_toystudy == [((tmp_path / "toy",), {"seed": 17})]
    assert str(tmp_path / "toy" / "study") in capsys.readouterr().out


def test_toy_study_without_seed_keeps_the_generator_default(fake_toystudy: list, tmp_path: Path) -> None:
    assert cli.main(["toy-study", str(tmp_path)]) == 0
    assert fake_toystudy == [((tmp_path,), {})]


@pytest.mark.parametrize("argv", [["toy-study"], ["toy-study", "d", "--seed", "x"], [], ["audit"],
                                  ["diff", "only-one"], ["frobnicate"]])
def test_bad_arguments_exit_2(argv: list[str], fake_toystudy: list, capsys: pytest.CaptureFixture[str]) -> None:
    # common practice: command-line usage errors exit with status 2 (argparse, POSIX utilities)
    with pytest.raises(SystemExit) as stop:
        cli.main(argv)
    assert stop.value.code == 2
    assert "usage: glmsteps" in capsys.readouterr().err
    assert fake_toystudy == []


def test_parser_options() -> None:
    args = cli.build_parser().parse_args(["audit", "x.nii.gz", "--json", "--verify", "--root", "w"])
    assert (args.command, args.path, args.json, args.verify, args.root) == ("audit", "x.nii.gz", True, True, "w")
    args = cli.build_parser().parse_args(["diff", "a.h5", "b.h5"])
    assert (args.command, args.path_a, args.path_b, args.json, args.root) == ("diff", "a.h5", "b.h5", False, None)


def test_user_error_is_one_line_without_traceback(tmp_path: Path) -> None:
    # the real console entry point, in a child process, so that stderr is exactly what a user sees
    done = subprocess.run([sys.executable, "-m", "glmsteps.cli", "audit", str(tmp_path / "missing.nii.gz")],
                          cwd=tmp_path, env={"PYTHONPATH": str(REPO), "PATH": ""},
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 2
    assert done.stdout == ""
    assert "Traceback" not in done.stderr
    assert done.stderr.count("\n") == 1 and "missing.nii.gz: no such file" in done.stderr
