"""Time the up-front contrast check (glmsteps.precheck) on many small events files.

Run by hand from the repository folder: ``python tests/benchmarks/bench_precheck.py [N_SUBJECTS]``.
Writes N subjects x 4 runs of 40-row BIDS events TSVs to a temporary folder, then times
``check_contrast_keys`` over all of them (median of 5, cold and warm file cache are not separated) and,
for comparison, reading the same files with pandas. Prints a table; asserts nothing.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def write_study(root: Path, n_subjects: int) -> list[str]:
    rng = np.random.default_rng(0)
    paths = []
    for s in range(n_subjects):
        for r in range(4):
            onsets = np.sort(rng.uniform(0, 400, 40)).round(2)
            kinds = rng.choice(["tap", "flash", "horn", "rest"], 40)
            lines = ["onset\tduration\ttrial_type\tresponse_time"] + [
                f"{o}\t2.0\t{k}\t{rng.uniform(0.3, 0.9):.3f}" for o, k in zip(onsets, kinds)]
            path = root / f"sub-{s:03d}_task-x_run-{r + 1}_events.tsv"
            path.write_text("\n".join(lines) + "\n")
            paths.append(str(path))
    return paths


def main() -> None:
    from glmsteps.precheck import check_contrast_keys

    n_subjects = int(sys.argv[1]) if len(sys.argv) > 1 else 500
    contrasts = {f"c{k}": {"weights": {"tap": 1, "flash": -1}} for k in range(10)}
    with tempfile.TemporaryDirectory() as tmp:
        paths = write_study(Path(tmp), n_subjects)
        times = []
        for _ in range(5):
            t0 = time.perf_counter()
            check_contrast_keys(paths, "trial_type", contrasts)
            times.append(time.perf_counter() - t0)
        import pandas as pd
        t0 = time.perf_counter()
        for p in paths:
            pd.read_csv(p, sep="\t", na_values=["n/a"], keep_default_na=False)
        pandas_s = time.perf_counter() - t0
    print(f"{len(paths)} events files ({n_subjects} subjects x 4 runs, 40 rows, 10 contrasts)")
    print(f"check_contrast_keys: median {statistics.median(times):.3f} s (min {min(times):.3f}, max {max(times):.3f})")
    print(f"pandas read_csv of the same files, once: {pandas_s:.3f} s")


if __name__ == "__main__":
    main()
