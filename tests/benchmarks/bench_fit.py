"""Benchmark of the fit step (run by hand; prints a table of ratios, asserts nothing).

    /work/venv/bin/python tests/benchmarks/bench_fit.py [--small-only] [--tmp DIR] [--keep] [--repeat N]
        [--models arp ar1]

For each synthetic run (64x64x40x300 and 97x115x97x300, float32 and int16 with
scl_slope, 50 % of the box in the mask, AR(1) noise) it measures, each in a
fresh subprocess so that peak memory (``ru_maxrss``) belongs to one task:

* nibabel ``get_fdata()`` of the .nii.gz (the yardstick);
* the whole fit job (stream + mask, OLS, autocorrelation model estimate, binned refit,
  HDF5 and QC maps written) with the step's defaults (``glmsteps.settings.FitSettings``:
  percent scaling, AR(8) with 5 mm smoothing of the estimates) and with each
  autocorrelation model given by ``--models`` (default: the default model, then ``ar1``);
* a per-voxel statsmodels GLS loop on a sample of voxels, extrapolated to the
  whole mask.

The yardstick and the job are run ``--repeat`` times (default 3), interleaved,
and the median of each is compared.

Targets: job time <= 0.5x get_fdata; job peak RSS <= 1.2x the in-mask float32
data + 100 MB. Module imports are timed apart on both sides (printed in their own
column): the yardstick's clock starts after ``import nibabel``, the job's after it
has imported the modules it uses (glmsteps, nibabel, h5py, isal). It also compares HDF5 compression filters on the large fit.
Needs about 2.5 GB of free space in the temporary folder for the large case.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve()
ROOT = HERE.parents[2]
sys.path.insert(0, str(ROOT))

N_VOL = 300
TR_S = 2.0
CASES = {"small": (64, 64, 40), "large": (97, 115, 97)}
BLAS_THREADS = "1"
JOB_THREADS = "1"


# --------------------------------------------------------------------------- data generation

def ellipsoid_mask(shape: tuple[int, int, int], fraction: float = 0.5) -> np.ndarray:
    """A centred ellipsoid holding about ``fraction`` of the box."""
    grids = np.meshgrid(*[(np.arange(s) + 0.5) / s - 0.5 for s in shape], indexing="ij")
    r2 = sum(g ** 2 for g in grids)
    return r2 <= np.quantile(r2, fraction)


def design(n: int) -> tuple[np.ndarray, list[str], list[str]]:
    t_s = np.arange(n) * TR_S
    a = ((t_s // 20) % 2 == 0).astype(float)
    b = ((t_s // 32) % 2 == 0).astype(float)
    k = np.arange(1, 5)
    drift = np.cos(np.pi * np.outer(np.arange(n) + 0.5, k) / n)
    rng = np.random.default_rng(5)
    motion = np.cumsum(rng.normal(0, 0.02, (n, 6)), axis=0)
    X = np.column_stack([a, b, drift, motion, np.ones(n)])
    names = ["a", "b"] + [f"drift_{i:02d}" for i in range(4)] + [f"motion_{i}" for i in range(6)] + ["intercept"]
    roles = ["interest"] * 2 + ["drift"] * 4 + ["confound"] * 6 + ["intercept"]
    return X, names, roles


def write_run(folder: Path, shape: tuple[int, int, int], kind: str) -> dict[str, str]:
    """Write bold (.nii.gz, streamed through a threaded gzip writer), mask, design and summary."""
    import nibabel as nib
    import pandas as pd
    from isal import igzip_threaded

    folder.mkdir(parents=True, exist_ok=True)
    affine = np.diag([2.0, 2.0, 2.0, 1.0])
    mask = ellipsoid_mask(shape)
    X, names, roles = design(N_VOL)
    dtype = np.float32 if kind == "float32" else np.int16
    hdr = nib.Nifti1Header()
    hdr.set_data_shape(shape + (N_VOL,))
    hdr.set_data_dtype(dtype)
    hdr.set_zooms((2.0, 2.0, 2.0, TR_S))
    hdr.set_xyzt_units("mm", "sec")
    hdr.set_qform(affine, 1)
    hdr.set_sform(affine, 1)
    slope = 0.05
    if kind == "int16":
        hdr["scl_slope"], hdr["scl_inter"] = slope, 0.0
    hdr["vox_offset"] = 352
    rng = np.random.default_rng(0)
    base = np.where(mask, 1000.0 + 200.0 * rng.random(shape), 0.0).astype(np.float32)
    effect = np.where(mask, 10.0 * rng.random(shape), 0.0).astype(np.float32)
    noise = np.zeros(shape, np.float32)
    path = folder / "bold.nii.gz"
    with igzip_threaded.open(path, "wb", compresslevel=1, threads=2) as out:
        out.write(hdr.binaryblock + b"\0" * 4)
        for t in range(N_VOL):
            noise = 0.3 * noise + rng.standard_normal(shape, dtype=np.float32) * 20.0
            vol = np.where(mask, base + effect * X[t, 0] + noise, 0.0)
            if kind == "int16":
                vol = np.round(vol / slope).astype(np.int16)
            out.write(np.asarray(vol, dtype=dtype).tobytes(order="F"))
    nib.save(nib.Nifti1Image(mask.astype(np.uint8), affine), folder / "mask.nii.gz")
    pd.DataFrame(X, columns=names).to_csv(folder / "design.tsv", sep="\t", index=False)
    (folder / "design.json").write_text(json.dumps({
        "names": names, "roles": roles, "conditions": ["a", "b"] + [""] * 11, "basis": ["main", "main"] + [""] * 11,
        "first_volume": 0, "n_volumes": N_VOL, "repetition_time_s": TR_S, "excluded": False}))
    return {"bold": str(path), "mask": str(folder / "mask.nii.gz"), "design": str(folder / "design.tsv"),
            "design_summary": str(folder / "design.json")}


# --------------------------------------------------------------------------- child tasks

def peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def child_fdata(bold: str) -> dict:
    t_import = time.perf_counter()
    import nibabel as nib

    t0 = time.perf_counter()
    data = nib.load(bold).get_fdata()
    return {"seconds": time.perf_counter() - t0, "peak_mb": peak_mb(), "shape": list(data.shape),
            "import_s": t0 - t_import}


def child_fit(inputs_json: str, out: str, model: str) -> dict:
    # Module imports are timed apart on both sides (a per-process constant that does not
    # grow with the data): the yardstick imports nibabel before its clock starts, so the
    # job gets the modules it loads lazily (nibabel for the header and maps, h5py for the
    # store, isal for decompression) loaded before its clock starts too.
    t_import = time.perf_counter()
    import h5py  # noqa: F401
    import isal.igzip  # noqa: F401
    import nibabel  # noqa: F401

    from glmsteps.jobs import fit as job
    import_s = time.perf_counter() - t_import

    inputs = json.loads(inputs_json)
    outputs = {k: str(Path(out) / (k + (".h5" if k == "fit" else ".nii.gz")))
               for k in ("fit", "mean", "residual_sd", "ar_coef")}
    params = {"autocorrelation": model}  # the other settings at the schema's defaults
    t0 = time.perf_counter()
    job.run(inputs, outputs, params, {"subject": "01", "run_id": "task-a_run-1"}, threads=int(JOB_THREADS))
    seconds = time.perf_counter() - t0
    side = json.loads((Path(out) / "fit.json").read_text())
    return {"seconds": seconds, "peak_mb": peak_mb(), "timing": side["timing_s"], "fitted": side["voxel_counts"]["fitted"],
            "n_bins": side["n_bins"], "import_s": import_s}


def child_statsmodels(inputs_json: str, sample: int) -> dict:
    import statsmodels.api as sm
    from scipy.linalg import toeplitz

    from glmsteps.volumes import read_bold_header, read_mask, stream_masked

    inputs = json.loads(inputs_json)
    mask, _ = read_mask(inputs["mask"])
    series = stream_masked(read_bold_header(inputs["bold"]), mask)
    X, _, _ = design(N_VOL)
    rng = np.random.default_rng(1)
    cols = rng.choice(series.Y.shape[1], sample, replace=False)
    t0 = time.perf_counter()
    for c in cols:
        y = 100.0 * series.Y[:, c] / series.Y[:, c].mean()
        ols = sm.OLS(y, X).fit()
        r = ols.resid
        rho = float(np.clip(r[1:] @ r[:-1] / (r @ r), -0.99, 0.99))
        sm.GLS(y, X, sigma=toeplitz(rho ** np.arange(N_VOL))).fit()
    per_voxel = (time.perf_counter() - t0) / sample
    return {"per_voxel_s": per_voxel, "extrapolated_s": per_voxel * series.Y.shape[1]}


def child_compression(fit_path: str, out: str) -> dict:
    from glmsteps import fitstore

    fit = fitstore.read_fit(fit_path)
    record = fit.attrs["provenance"]
    result = {}
    for comp in (None, "lzf", "gzip"):
        fitstore.COMPRESSION = comp
        target = Path(out) / f"fit-{comp}.h5"
        t0 = time.perf_counter()
        fitstore.write_fit(target, fit, record)
        result[str(comp)] = {"seconds": time.perf_counter() - t0, "mb": target.stat().st_size / 1e6}
        target.unlink()
    return result


def median_run(results: list[dict]) -> dict:
    """The result whose time is the median (the lower middle one for an even count)."""
    ordered = sorted(results, key=lambda r: r["seconds"])
    return ordered[(len(ordered) - 1) // 2]


def run_child(*args: str) -> dict:
    # One BLAS thread, as Snakemake gives a threads=1 job (it sets OPENBLAS_NUM_THREADS and friends
    # to the job's threads); with the default (all cores) BLAS threads fight over a shared machine.
    env = {**os.environ, "PYTHONPATH": str(ROOT), "OPENBLAS_NUM_THREADS": BLAS_THREADS, "OMP_NUM_THREADS": BLAS_THREADS}
    proc = subprocess.run([sys.executable, str(HERE), "--blas-threads", BLAS_THREADS, "--job-threads", JOB_THREADS,
                           "--child", *args], capture_output=True, text=True, env=env)
    if proc.returncode:
        sys.stderr.write(proc.stderr)
        raise SystemExit(f"child {args[0]} failed")
    return json.loads(proc.stdout.strip().splitlines()[-1])


# --------------------------------------------------------------------------- main

def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--small-only", action="store_true")
    ap.add_argument("--tmp", default=tempfile.gettempdir())
    ap.add_argument("--keep", action="store_true", help="keep the generated runs")
    ap.add_argument("--sample", type=int, default=100, help="voxels in the statsmodels loop (0: skip it)")
    ap.add_argument("--repeat", type=int, default=3, help="repeats of the yardstick and of the job (medians used)")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    ap.add_argument("--blas-threads", default="1", help="OPENBLAS_NUM_THREADS of the measured tasks")
    ap.add_argument("--job-threads", default="1", help="threads of the fit job (the rule's `threads`)")
    ap.add_argument("--models", nargs="+", default=["arp", "ar1"], help="fit.autocorrelation values to time")
    args = ap.parse_args()
    global BLAS_THREADS, JOB_THREADS
    BLAS_THREADS, JOB_THREADS = str(args.blas_threads), str(args.job_threads)
    if args.child:
        task, *rest = args.child
        fn = {"fdata": child_fdata, "fit": child_fit, "statsmodels": child_statsmodels,
              "compression": child_compression}[task]
        rest = [int(r) if task == "statsmodels" and i == 1 else r for i, r in enumerate(rest)]
        print(json.dumps(fn(*rest)))
        return
    work = Path(tempfile.mkdtemp(prefix="glmsteps-bench-", dir=args.tmp))
    rows = []
    try:
        for case, shape in CASES.items():
            if args.small_only and case != "small":
                continue
            for kind in ("float32", "int16"):
                folder = work / f"{case}-{kind}"
                t0 = time.perf_counter()
                inputs = write_run(folder, shape, kind)
                gen_s = time.perf_counter() - t0
                v = int(ellipsoid_mask(shape).sum())
                data_mb = N_VOL * v * 4 / 2 ** 20
                # interleaved repeats; each side's median is used (the machine is shared and noisy)
                fdatas, fits = [], {m: [] for m in args.models}
                for _ in range(args.repeat):
                    fdatas.append(run_child("fdata", inputs["bold"]))
                    for m in args.models:
                        fits[m].append(run_child("fit", json.dumps(inputs), str(folder / "out"), m))
                fdata = median_run(fdatas)
                for m in args.models:
                    fit = median_run(fits[m])
                    ratios = sorted(f["seconds"] / d["seconds"] for f, d in zip(fits[m], fdatas))
                    row = {"case": f"{case} {'x'.join(map(str, shape))}x{N_VOL} {kind} {m}",
                           "gz_mb": Path(inputs["bold"]).stat().st_size / 2 ** 20, "gen_s": gen_s,
                           "fdata_s": fdata["seconds"], "fdata_mb": fdata["peak_mb"], "fit_s": fit["seconds"],
                           "fit_mb": fit["peak_mb"], "data_mb": data_mb, "budget_mb": 1.2 * data_mb + 100,
                           "timing": fit["timing"], "n_bins": fit["n_bins"], "fdata_import_s": fdata["import_s"],
                           "fit_import_s": fit["import_s"], "pair_ratios": [round(r, 2) for r in ratios]}
                    rows.append(row)
                    print(json.dumps(row), flush=True)
                row = rows[-len(args.models)]
                if kind == "float32" and args.sample > 0:
                    sm_res = run_child("statsmodels", json.dumps(inputs), str(args.sample))
                    row["statsmodels_s"] = sm_res["extrapolated_s"]
                if case == "large" and kind == "float32":
                    row["compression"] = run_child("compression", str(folder / "out" / "fit.h5"), str(folder))
                shutil.rmtree(folder) if not args.keep else None
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
    print()
    print(f"Medians of {args.repeat} interleaved repeats; 'each pair' lists the ratio of every repeat. "
          f"Fit job threads {JOB_THREADS}, BLAS threads {BLAS_THREADS}.")
    print()
    print("| run | .gz MB | get_fdata s (peak MB) | fit job s (peak MB) | time ratio (target <= 0.5); each pair "
          "| memory: peak / (1.2 x data + 100 MB) (target <= 1) | statsmodels GLS loop, extrapolated s (ratio) "
          "| imports s: yardstick / job (not in the times) |")
    print("|---|---|---|---|---|---|---|---|")
    for r in rows:
        sm_text = (f"{r['statsmodels_s']:.0f} ({r['statsmodels_s'] / r['fit_s']:.0f}x)"
                   if "statsmodels_s" in r else "-")
        print(f"| {r['case']} | {r['gz_mb']:.0f} | {r['fdata_s']:.2f} ({r['fdata_mb']:.0f}) | "
              f"{r['fit_s']:.2f} ({r['fit_mb']:.0f}) | {r['fit_s'] / r['fdata_s']:.2f}; "
              f"{', '.join(f'{x:.2f}' for x in r['pair_ratios'])} | "
              f"{r['fit_mb']:.0f} / {r['budget_mb']:.0f} = {r['fit_mb'] / r['budget_mb']:.2f} | {sm_text} | "
              f"{r['fdata_import_s']:.2f} / {r['fit_import_s']:.2f} |")
    for r in rows:
        if "compression" in r:
            print()
            print("| HDF5 filter (large fit) | write s | file MB |")
            print("|---|---|---|")
            for comp, c in r["compression"].items():
                print(f"| {comp} | {c['seconds']:.2f} | {c['mb']:.0f} |")
    print()
    for r in rows:
        print(r["case"], "job phases (s):", r["timing"], "bins:", r["n_bins"])


if __name__ == "__main__":
    main()
