"""Benchmark: DAG build time and peak memory for large synthetic studies (issue 7).

Builds studies of 50, 200 and 500 subjects x 4 runs x 10 contrasts whose images are
empty (only the DAG is built: ``snakemake --dry-run``), and prints wall time and peak RSS.
Run by hand: ``python tests/benchmarks/bench_dag.py [n_subjects ...]``.
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

REPO = Path(__file__).resolve().parents[2]


#: Events of every synthetic run: the workflow's precheck reads each events file's condition column.
EVENTS_TSV = "onset\tduration\ttrial_type\n" + "".join(f"{10 * k}\t1\tcond{k % 5}\n" for k in range(10))


def make_study(root: Path, n_subjects: int, n_runs: int = 4) -> None:
    """Synthetic BIDS-style inputs: empty images (only the DAG is built), real events tables."""
    for s in range(1, n_subjects + 1):
        func = root / f"sub-{s:03d}" / "func"
        func.mkdir(parents=True)
        (root / f"sub-{s:03d}" / "anat").mkdir()
        (root / f"sub-{s:03d}" / "anat" / f"sub-{s:03d}_mask.nii.gz").touch()
        for r in range(1, n_runs + 1):
            stem = f"sub-{s:03d}_task-big_run-{r}"
            for suffix in ("_bold.nii.gz", "_confounds.tsv"):
                (func / f"{stem}{suffix}").touch()
            (func / f"{stem}_events.tsv").write_text(EVENTS_TSV)
    (root / "participants.tsv").write_text("participant_id\tsite\n")


def make_config(root: Path, n_contrasts: int = 10, run_maps: bool = False) -> dict:
    conditions = [f"cond{k}" for k in range(5)]
    contrasts = {f"c{k:02d}": {"weights": {conditions[k % 5]: 1, conditions[(k + 1) % 5]: -1}}
                 for k in range(n_contrasts)}
    return {
        "inputs": {"root": str(root),
                   "bold": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_bold.nii.gz",
                   "events": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_events.tsv",
                   "confounds": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_confounds.tsv",
                   "mask": "sub-{subject}/anat/sub-{subject}_mask.nii.gz"},
        "contrasts": contrasts,
        "contrast_options": {"run_maps": run_maps},
        "thresholds": {"run": {"fdr05": {"method": "fdr", "q": 0.05}} if run_maps else {},
                       "subject": {"fdr05": {"method": "fdr", "q": 0.05}}},
        "group_models": {"all": {"design": "one_sample", "group_contrasts": {"mean": {"mean": 1}}}},
    }


def measure(n_subjects: int, run_maps: bool) -> tuple[float, float, int]:
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "data"
        make_study(root, n_subjects)
        cfg = Path(tmp) / "config.yaml"
        cfg.write_text(yaml.safe_dump(make_config(root, run_maps=run_maps)))
        env = dict(os.environ, PYTHONPATH=str(REPO))
        cmd = [sys.executable, "-m", "snakemake", "--snakefile", str(REPO / "Snakefile"), "--directory", tmp,
               "--configfile", str(cfg), "--dry-run", "--quiet", "rules", "--cores", "2"]
        rss_file = Path(tmp) / "peak_kb"
        if Path("/usr/bin/time").exists():  # GNU time: this one command's own peak RSS
            cmd = ["/usr/bin/time", "-f", "%M", "-o", str(rss_file)] + cmd
        t0 = time.perf_counter()
        proc = subprocess.run(cmd, capture_output=True, text=True, env=env)
        wall = time.perf_counter() - t0
        if proc.returncode != 0:
            raise SystemExit(proc.stdout[-3000:] + proc.stderr[-3000:])
        if rss_file.exists():
            peak_mb = int(rss_file.read_text().split()[-1]) / 1024
        else:  # the largest child so far (an upper bound)
            peak_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        total = next((int(line.split()[-1]) for line in proc.stdout.splitlines() if line.startswith("total")), -1)
        return wall, peak_mb, total


def main(sizes: list[int]) -> None:
    """Print one row per size and layout: with run-level maps (one contrast job per run and
    contrast, each thresholded) and without (``contrast_options.run_maps: false``: subject
    maps straight from the fits, one job per subject and contrast)."""
    print(f"{'subjects':>8} {'run maps':>9} {'jobs':>8} {'wall s':>8} {'ms/job':>7} {'peak MB':>8}")
    for n in sizes:
        for run_maps in (True, False):
            wall, peak, jobs = measure(n, run_maps)
            print(f"{n:>8} {str(run_maps):>9} {jobs:>8} {wall:>8.1f} {1000 * wall / max(jobs, 1):>7.2f} {peak:>8.0f}")


if __name__ == "__main__":
    main([int(a) for a in sys.argv[1:]] or [50, 200, 500])
