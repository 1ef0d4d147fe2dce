"""Benchmark: the whole workflow's speed (issue 16), every number measured in this one run.

Measures
(a) the toy study end to end from a fresh results folder (``snakemake --cores 2`` with the
    default profile): wall time, the sum of the jobs' bodies (each job's log ends with a
    ``timing:`` line written by ``glmsteps.jobs.common.run_script``) and their ratio;
(b) the median per-job start-up overhead (the job's process start to its body start, from
    the same lines), and the bodies by step;
(c) a synthetic study (default: 500 subjects x 4 runs x 6 contrasts, default settings, empty
    images: only the DAG is built): ``snakemake -n`` wall time and peak RSS, and the no-op
    run (every output present and up to date) wall time;
(d) adding one contrast to the finished toy study: wall time of that run against the full run.

Targets (issue 16): (a) <= 60 s and <= 1.5x the bodies; (b) <= 0.3 s; (c) <= 30 s, <= 1 GB,
no-op <= 30 s; (d) <= 10 % of the full run. They are printed beside the numbers, never
asserted. Run by hand or in CI as a report:

    python tests/benchmarks/bench_workflow.py                 # everything
    python tests/benchmarks/bench_workflow.py --subjects 50   # a smaller synthetic study
    python tests/benchmarks/bench_workflow.py --skip-toy      # (c) only
    python tests/benchmarks/bench_workflow.py --skip-synthetic
"""

from __future__ import annotations

import argparse
import os
import re
import statistics
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path

import yaml

HERE = Path(__file__).resolve().parent
REPO = HERE.parents[1]
sys.path.insert(0, str(HERE))

from bench_dag import make_config, make_study  # noqa: E402

_TIMING = re.compile(r"timing: process_start=([0-9.]+) body_start=([0-9.]+) body_end=([0-9.]+)")
_OUTPUT = re.compile(r"^\s+output: (.*)$")


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    return env


@dataclass
class Run:
    """One Snakemake command: wall seconds, CPU seconds (user + system, of Snakemake and the processes
    it waited for; jobs forked by the warm launcher are not among them), peak RSS (MB) and its output."""

    wall: float
    cpu: float
    peak_mb: float
    output: str


def snakemake(workdir: Path, config: Path, *args: str) -> Run:
    """Run Snakemake (the repository's Snakefile, its default profile) under GNU time."""
    cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "Snakefile"), "--directory", str(workdir),
           "--configfile", str(config), *args]
    usage = workdir / ".bench_time"
    if Path("/usr/bin/time").exists():  # GNU time: CPU seconds and this command's own peak RSS
        cmd = ["/usr/bin/time", "-f", "%U %S %M", "-o", str(usage)] + cmd
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True, env=_env())
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"snakemake {' '.join(args)} failed:\n{proc.stdout[-3000:]}\n{proc.stderr[-5000:]}")
    cpu, peak_mb = float("nan"), float("nan")
    if usage.exists():
        user, system, peak_kb = usage.read_text().split()[-3:]
        cpu, peak_mb = float(user) + float(system), int(peak_kb) / 1024
        usage.unlink()
    return Run(wall, cpu, peak_mb, proc.stdout + proc.stderr)


def job_timings(logs: Path, since: float = 0.0) -> list[tuple[str, float, float]]:
    """(step, start-up overhead s, body s) of every job whose log was written after ``since``."""
    rows = []
    for log in logs.rglob("*.log"):
        if log.stat().st_mtime < since:
            continue
        m = _TIMING.search(log.read_text(errors="replace"))
        if m:
            process, start, end = (float(x) for x in m.groups())
            rows.append((_step_of(log), start - process, end - start))
    return rows


def _step_of(log: Path) -> str:
    """A readable step name from a job's log path."""
    name = log.stem
    if "_threshold-" in name or name.endswith("threshold"):
        return "threshold"
    if name.endswith("_permutation"):
        return "group_permutation"
    if "group" in log.parts and "model-" in str(log):
        return "group_model"
    if name.startswith("contrast-"):
        return "combine_runs" if log.parent.name == "combined" else "contrast"
    return name


def toy_study(base: Path, jobs: int) -> dict[str, object]:
    """(a), (b) and (d) on the toy study in ``base``."""
    data = base / "data"
    subprocess.run([sys.executable, "-c", "import sys; from glmsteps.cli import main; sys.exit(main())",
                    "toy-study", str(data)], check=True, env=_env(), capture_output=True)
    config = yaml.safe_load((REPO / "config" / "config.yaml").read_text())
    config["inputs"]["root"] = str(data)
    config_path = base / "config.yaml"
    config_path.write_text(yaml.safe_dump(config, sort_keys=False))
    started = time.time()
    full = snakemake(base, config_path, "--cores", str(jobs))
    timings = job_timings(base / "results" / "logs", since=started)
    by_step: dict[str, list[float]] = defaultdict(list)
    for step, _, body in timings:
        by_step[step].append(body)
    bodies = sum(body for _, _, body in timings)
    overheads = [o for _, o, _ in timings]

    # (d) one more contrast on the finished study
    config["contrasts"]["tap_minus_horn"] = {"weights": {"tap": 1, "horn": -1}}
    config_path.write_text(yaml.safe_dump(config, sort_keys=False))
    added_started = time.time()
    added = snakemake(base, config_path, "--cores", str(jobs))
    added_jobs = len(job_timings(base / "results" / "logs", since=added_started))
    return {"wall": full.wall, "cpu": full.cpu, "jobs": len(timings), "bodies": bodies, "overhead_median": statistics.median(overheads),
            "overhead_p90": sorted(overheads)[int(0.9 * (len(overheads) - 1))], "by_step": by_step,
            "added_wall": added.wall, "added_cpu": added.cpu, "added_jobs": added_jobs}


def synthetic_study(base: Path, n_subjects: int, n_runs: int, n_contrasts: int) -> dict[str, float]:
    """(c): dry run (wall, peak RSS) and no-op run of a synthetic study with every output in place."""
    root = base / "data"
    make_study(root, n_subjects, n_runs)
    config = make_config(root, n_contrasts=n_contrasts, run_maps=True)
    config["thresholds"].pop("run", None)  # the schema's default: no run-level thresholds
    config_path = base / "config.yaml"
    config_path.write_text(yaml.safe_dump(config))
    dry = snakemake(base, config_path, "--dry-run", "--cores", "2")
    n_jobs = next((int(line.split()[-1]) for line in dry.output.splitlines() if line.startswith("total")), -1)

    # every output in place, all with one time stamp (none older than its inputs), then a no-op run
    listing = snakemake(base, config_path, "--dry-run", "--quiet", "host", "--cores", "2").output
    stamp = time.time()
    for line in listing.splitlines():
        m = _OUTPUT.match(line)
        if m:
            for name in m.group(1).split(", "):
                path = base / name
                path.parent.mkdir(parents=True, exist_ok=True)
                path.touch()
                os.utime(path, (stamp, stamp))
    noop = snakemake(base, config_path, "--cores", "2")
    if "Nothing to be done" not in noop.output:
        raise SystemExit(f"the no-op run planned jobs:\n{noop.output[-3000:]}")
    return {"jobs": n_jobs, "dry_wall": dry.wall, "dry_cpu": dry.cpu, "peak_mb": dry.peak_mb,
            "noop_wall": noop.wall, "noop_cpu": noop.cpu}


def _print_rows(rows: list[tuple[str, str, str]]) -> None:
    width = max(len(r[0]) for r in rows)
    print(f"{'measure':<{width}}  {'value':>12}  target")
    for name, value, target in rows:
        print(f"{name:<{width}}  {value:>12}  {target}")
    sys.stdout.flush()


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--subjects", type=int, default=500, help="synthetic study's subjects (default 500)")
    parser.add_argument("--runs", type=int, default=4, help="runs per synthetic subject (default 4)")
    parser.add_argument("--contrasts", type=int, default=6, help="synthetic study's contrasts (default 6)")
    parser.add_argument("--cores", type=int, default=2, help="cores of the toy study's run (default 2)")
    parser.add_argument("--skip-toy", action="store_true")
    parser.add_argument("--skip-synthetic", action="store_true")
    args = parser.parse_args(argv)
    print(f"bench_workflow {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}, {os.cpu_count()} cores, "
          f"load average {os.getloadavg()[0]:.2f} at the start")
    rows: list[tuple[str, str, str]] = []
    if not args.skip_toy:
        with tempfile.TemporaryDirectory() as tmp:
            toy = toy_study(Path(tmp), args.cores)
        rows += [
            ("toy study end to end: wall s", f"{toy['wall']:.1f}", "<= 60"),
            ("toy study: CPU s of Snakemake and its waited-for processes", f"{toy['cpu']:.1f}", ""),
            ("toy study: jobs", f"{toy['jobs']}", ""),
            ("toy study: sum of job bodies s", f"{toy['bodies']:.1f}", ""),
            ("toy study: wall / bodies", f"{toy['wall'] / toy['bodies']:.2f}", "<= 1.5"),
            ("per-job start-up overhead, median s", f"{toy['overhead_median']:.3f}", "<= 0.3"),
            ("per-job start-up overhead, 90th percentile s", f"{toy['overhead_p90']:.3f}", ""),
            ("one contrast added: wall s", f"{toy['added_wall']:.1f}", ""),
            ("one contrast added: CPU s (as above)", f"{toy['added_cpu']:.1f}", ""),
            ("one contrast added: jobs", f"{toy['added_jobs']}", ""),
            ("one contrast added / full run", f"{toy['added_wall'] / toy['wall']:.2f}", "<= 0.10"),
        ]
        for step, bodies in sorted(toy["by_step"].items(), key=lambda kv: -sum(kv[1])):
            rows.append((f"  bodies of {step} ({len(bodies)} jobs): sum s, median s",
                         f"{sum(bodies):.1f}, {statistics.median(bodies):.2f}", ""))
        _print_rows(rows)
        rows = []
    if not args.skip_synthetic:
        with tempfile.TemporaryDirectory() as tmp:
            syn = synthetic_study(Path(tmp), args.subjects, args.runs, args.contrasts)
        size = f"{args.subjects} subjects x {args.runs} runs x {args.contrasts} contrasts"
        rows += [
            (f"{size}: jobs", f"{syn['jobs']}", ""),
            (f"{size}: snakemake -n wall s", f"{syn['dry_wall']:.1f}", "<= 30"),
            (f"{size}: snakemake -n CPU s", f"{syn['dry_cpu']:.1f}", ""),
            (f"{size}: snakemake -n peak RSS MB", f"{syn['peak_mb']:.0f}", "<= 1024"),
            (f"{size}: no-op run wall s", f"{syn['noop_wall']:.1f}", "<= 30"),
            (f"{size}: no-op run CPU s", f"{syn['noop_cpu']:.1f}", ""),
        ]
        _print_rows(rows)
    print(f"load average {os.getloadavg()[0]:.2f} at the end (wall times on a shared machine grow with its load; "
          "CPU seconds much less)")


if __name__ == "__main__":
    main()
