"""Tests of ``glmsteps run``: config files checked before Snakemake, the Snakemake command, the wheel.

References: Snakemake 9's own argument parser (``snakemake.cli.get_argument_parser``) for
which config files and Snakefile a command line names, and Snakemake's own config loader
(``snakemake.common.configfile.load_configfile``) for what it would evaluate.
"""

from __future__ import annotations

import ast
import os
import re
import shutil
import subprocess
import sys
import sysconfig
from pathlib import Path

import pytest

from glmsteps import runner
from glmsteps.errors import ConfigError

REPO = Path(__file__).resolve().parents[1]


def snakemake_parser():
    from snakemake.cli import get_argument_parser

    return get_argument_parser()


@pytest.mark.parametrize("args", [
    ["--cores", "8", "-n"],
    ["--configfile", "a.yaml", "--cores", "8"],
    ["--configfile", "a.yaml", "b.yaml", "-n"],
    ["--configfiles=c.yaml", "--config", "output_dir=x"],
    ["--config", "output_dir=x", "--configfile", "d.yaml"],
    ["--configfile=a.yaml", "--cores", "2", "--configfile", "b.yaml", "c.yaml"],
])
def test_config_files_are_the_ones_snakemake_reads(args: list[str]) -> None:
    expected = [str(p) for p in snakemake_parser().parse_args(args).configfile]
    assert runner.config_files_in(args) == expected


@pytest.mark.parametrize("args", [["-s", "other.smk"], ["--snakefile", "other.smk"], ["--snakefile=other.smk"],
                                  ["-sother.smk"], ["--cores", "2", "--snake", "other.smk"]])
def test_another_snakefile_is_refused(args: list[str], tmp_path: Path) -> None:
    assert snakemake_parser().parse_args(args).snakefile is not None  # they do name a Snakefile
    with pytest.raises(ConfigError, match=r"glmsteps' own workflow") as caught:
        runner.snakemake_command(args, workflow=tmp_path)
    assert "\n" not in str(caught.value)


def test_other_arguments_pass_unchanged(tmp_path: Path) -> None:
    args = ["--cores", "8", "--configfile", "my.yaml", "-n", "--set-threads", "fit=4", "--", "all"]
    command = runner.snakemake_command(args, workflow=tmp_path, python="py")
    assert command == ["py", "-m", "snakemake", "--snakefile", str(tmp_path / "Snakefile"), *args]
    assert snakemake_parser().parse_args(command[3:]).snakefile == str(tmp_path / "Snakefile")


def test_the_shipped_profile_is_found_from_any_folder(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    workflow = tmp_path / "installed"
    (workflow / "config" / "slurm").mkdir(parents=True)
    elsewhere = tmp_path / "study"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    packaged = str(workflow / "config" / "slurm")
    assert runner.snakemake_command(["--profile", "config/slurm", "-n"], workflow)[5:] == ["--profile", packaged, "-n"]
    assert runner.snakemake_command(["--profile=config/slurm"], workflow)[5:] == [f"--profile={packaged}"]
    # a folder of that name in the study's own folder wins, as Snakemake would find it there first
    (elsewhere / "config" / "slurm").mkdir(parents=True)
    assert runner.snakemake_command(["--profile", "config/slurm"], workflow)[5:] == ["--profile", "config/slurm"]


def test_a_clone_runs_its_own_top_level_workflow() -> None:
    assert runner.workflow_dir() == REPO
    for part in runner.WORKFLOW_PARTS:
        assert (REPO / part).exists(), part


def test_cli_prints_the_workflow_folder_and_the_run_help(capsys: pytest.CaptureFixture[str]) -> None:
    from glmsteps import cli

    assert cli.main(["workflow-dir"]) == 0
    assert capsys.readouterr().out == f"{REPO}\n"
    with pytest.raises(SystemExit) as stop:
        cli.main(["run", "--cores", "2", "--help"])  # glmsteps' own help, never Snakemake started
    assert stop.value.code == 0
    assert "usage: glmsteps run" in capsys.readouterr().out


def test_the_build_hook_ships_every_part_of_the_workflow() -> None:
    # setup.py is read, not run (running it would start a build)
    tree = ast.parse((REPO / "setup.py").read_text())
    assigned = {node.targets[0].id: node.value for node in tree.body
                if isinstance(node, ast.Assign) and isinstance(node.targets[0], ast.Name)}
    assert ast.literal_eval(assigned["WORKFLOW_PARTS"]) == runner.WORKFLOW_PARTS
    assert runner.PACKAGED_WORKFLOW in ast.unparse(assigned["PACKAGED_WORKFLOW"])
    manifest = (REPO / "MANIFEST.in").read_text().split()
    for part in runner.WORKFLOW_PARTS:
        assert part in manifest, f"MANIFEST.in leaves {part} out of the sdist"


def test_snakemake_would_evaluate_a_template_config_so_it_is_refused(tmp_path: Path) -> None:
    pytest.importorskip("glmsteps.configfile")  # the safe reader (hardening branch)
    from snakemake.common.configfile import load_configfile

    path = tmp_path / "templated.yaml"
    path.write_text("__use_yte__: true\noutput_dir: ?str(6 * 7)\n")
    assert load_configfile(str(path))["output_dir"] == "42"  # Snakemake evaluates the Python expression
    with pytest.raises(ConfigError, match=r"templated\.yaml: top-level key '__use_yte__'") as caught:
        runner.check_config_file(path)
    assert "\n" not in str(caught.value)


def _child_env(**extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    env.update(extra)
    return env


@pytest.mark.parametrize("text, words", [
    ('output_dir: !!python/object/apply:os.system ["touch {sentinel}"]\n', r"line 1.*!!python/object/apply:os\.system"),
    ("inputs:\n  root: data\n bold: x\n", r"line 3"),
    ('__use_yte__: true\noutput_dir: ?__import__("os").system("touch {sentinel}")\n', r"__use_yte__"),
])
def test_a_bad_config_stops_before_snakemake_in_one_line(text: str, words: str, tmp_path: Path) -> None:
    pytest.importorskip("glmsteps.configfile")
    sentinel = tmp_path / "executed"
    config = tmp_path / "my.yaml"
    config.write_text(text.format(sentinel=sentinel))
    done = subprocess.run([sys.executable, "-m", "glmsteps", "run", "--configfile", str(config), "--cores", "1", "-n"],
                          cwd=tmp_path, env=_child_env(PYTHONPATH=str(REPO)), capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 2
    assert done.stderr.count("\n") == 1 and "Traceback" not in done.stderr
    assert re.search(rf"glmsteps run: error: {re.escape(str(config))}: .*{words}", done.stderr), done.stderr
    assert not sentinel.exists()  # nothing in the file ran
    assert not (tmp_path / ".snakemake").exists()  # Snakemake never started


def _job_counts(dry_run_output: str) -> dict[str, int]:
    """The 'Job stats' table of a Snakemake dry run: rule -> count."""
    table = dry_run_output.split("Job stats:")[1].split("\n\n")[0]
    return {m[1]: int(m[2]) for m in re.finditer(r"^(\w+)\s+(\d+)$", table, flags=re.M)}


def _not_sources(folder: str, names: list[str]) -> set[str]:
    """What a wheel is not built from: environments, builds, caches, results, the toy study's data."""
    skip = {".git", ".venv", "venv", "build", "dist", ".snakemake", "__pycache__", ".pytest_cache"}
    skip |= {n for n in names if n.endswith(".egg-info") or n.startswith("results")}
    if Path(folder).resolve() == REPO / "toy_study":
        skip.add("data")
    return skip & set(names)


@pytest.mark.slow
def test_installed_wheel_runs_the_workflow_outside_the_clone(tmp_path: Path) -> None:
    pytest.importorskip("glmsteps.configfile")  # glmsteps run reads every config file with it first
    # the wheel into a fresh environment; its dependencies are the running environment's own
    # (a path line to its site-packages: no download, and no editable glmsteps hook runs from there)
    source, wheels, venv, study = (tmp_path / name for name in ("source", "wheels", "venv", "study"))
    # built from a copy: pip builds in the source folder, whose build/ would otherwise be reused
    shutil.copytree(REPO, source, ignore=_not_sources)
    subprocess.run([sys.executable, "-m", "pip", "wheel", str(source), "--no-deps", "-q", "-w", str(wheels)],
                   cwd=tmp_path, env=_child_env(), check=True, timeout=600)
    (wheel,) = wheels.glob("glmsteps-*.whl")
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=120)
    subprocess.run([sys.executable, "-m", "pip", "--python", str(venv / "bin" / "python"), "install", "-q",
                    "--no-deps", str(wheel)], env=_child_env(), check=True, timeout=300)
    site = subprocess.run([str(venv / "bin" / "python"), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                          capture_output=True, text=True, check=True).stdout.strip()
    Path(site, "running_env_deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    study.mkdir()
    env = _child_env(PATH=f"{venv / 'bin'}{os.pathsep}{os.environ.get('PATH', '')}")

    def glmsteps(*args: str, check: bool = True) -> subprocess.CompletedProcess[str]:
        done = subprocess.run(["glmsteps", *args], cwd=study, env=env, capture_output=True, text=True, timeout=900)
        if check and done.returncode != 0:
            raise AssertionError(f"glmsteps {' '.join(args)} failed:\n{done.stdout[-3000:]}\n{done.stderr[-3000:]}")
        return done

    installed = Path(glmsteps("workflow-dir").stdout.strip())
    assert installed == Path(site) / "glmsteps" / "_workflow"
    assert not installed.is_relative_to(REPO)
    for part in runner.WORKFLOW_PARTS:
        assert (installed / part).exists(), part

    glmsteps("toy-study", "toy_study/data")  # where the shipped config/config.yaml looks for it
    plan = glmsteps("run", "--cores", "2", "-n", "--quiet", "host")
    counts = _job_counts(plan.stdout)
    n_runs = len(list((study / "toy_study" / "data").glob("sub-*/func/*_bold.nii.gz")))
    assert n_runs > 0 and counts["fit"] == n_runs and counts["index"] == 1 and counts["report"] == 1
    assert f"{installed / 'profiles' / 'default'}" in plan.stdout + plan.stderr  # the shipped quiet profile
    # the same plan as the clone's own workflow makes for this folder
    clone = subprocess.run([sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "Snakefile"), "--cores", "2",
                            "-n", "--quiet", "host"], cwd=study, env=_child_env(PYTHONPATH=str(REPO)),
                           capture_output=True, text=True, timeout=900)
    assert clone.returncode == 0, clone.stderr[-3000:]
    assert _job_counts(clone.stdout) == counts

    # one run's chain for real: light steps through the launcher, the fit in its own process
    run_dir = sorted((study / "toy_study" / "data").glob("sub-*/func/*_bold.nii.gz"))[0]
    subject = run_dir.name.split("_")[0]
    run_id = re.search(r"_(task-[^_]+_run-[^_]+)_", run_dir.name)[1]
    target = f"results/{subject}/{run_id}/contrast-tap/z.nii.gz"
    glmsteps("run", "--cores", "2", target)
    assert (study / target).is_file() and (study / target.replace(".nii.gz", ".json")).is_file()

    # a broken config file from the installed command: one line, before Snakemake
    (study / "broken.yaml").write_text("inputs:\n  root: data\n bold: x\n")
    done = glmsteps("run", "--configfile", "broken.yaml", "-n", check=False)
    assert done.returncode == 2 and done.stderr.count("\n") == 1 and "broken.yaml: line 3" in done.stderr
