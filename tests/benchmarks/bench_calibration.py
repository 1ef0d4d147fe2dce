"""Calibration report of the run-level autocorrelation models (run by hand; prints tables, asserts nothing).

    OPENBLAS_NUM_THREADS=1 nice -n 10 python tests/benchmarks/bench_calibration.py [--grid 40 50 50]
        [--sections null short_tr bias power edge]

Simulated nulls (``tests/calibration_helpers.py``): 300 volumes, double-gamma block (A 16 s, rest,
B 16 s, rest) and event (2-6 s apart) designs, 128 s cosine drift, spatially independent noise on a
grid of 3 mm voxels, fitted exactly as the fit step fits a run (``glmsteps.fitting.fit_voxels``)
with its defaults (``arp``: AR(8), smoothing twice the voxel size (6 mm here), bins of 0.01) and with ``ar1``.

Sections
    null      false-positive rates of contrasts A and A - B at p < 0.05 and p < 0.001 (two-sided),
              noise x design x TR x model, with the binomial 95 % interval of nominal at the
              simulated voxel count (``*`` marks a rate outside it).
    short_tr  issue 14: AR(1) nulls (rho 0.2, 0.35, 0.5), TR 0.7, 0.8, 1.0 s, 300 volumes,
              6 censored volumes (spike regressors): rates at p < 0.001, z standard deviation.
    bias      mean AR coefficient estimates (per voxel, before smoothing, and the ones the fit
              uses) against the truth, in Monte-Carlo standard errors.
    power     sensitivity at a fixed true false-positive rate (0.001 and 0.05; thresholds from the
              model's own null voxels of the same grid) with a planted effect on half the voxels.
    edge      a patch of AR(1) 0.5 noise in AR(1) 0.1 noise: rates at p < 0.001 in the patch, in
              its 2-voxel border and outside, with the default smoothing (6 mm) without and with the tissue map.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import scipy.stats

HERE = Path(__file__).resolve()
ROOT = HERE.parents[2]
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

import calibration_helpers as ch  # noqa: E402
from glmsteps import estimation as est  # noqa: E402
from glmsteps import fitting  # noqa: E402

ALPHAS = (0.05, 0.001)


def rate_text(count: int, v: int, alpha: float) -> str:
    lo, hi = ch.binomial_interval(v, alpha)
    flag = "" if lo <= count <= hi else "*"
    return f"{flag}{count / v:.4f} ({count})" if alpha >= 0.01 else f"{flag}{count / v:.5f} ({count})"


def z_sd(t: np.ndarray, dof: int) -> float:
    p = 2.0 * scipy.stats.t.sf(np.abs(t), dof)
    return float(np.std(np.sign(t) * scipy.stats.norm.isf(p / 2)))


def section_null(grid: tuple[int, int, int]) -> None:
    v = int(np.prod(grid))
    intervals = {a: ch.binomial_interval(v, a) for a in ALPHAS}
    print(f"\n## Null false-positive rates ({v} voxels per cell; binomial 95 % interval of the count: "
          + ", ".join(f"p < {a}: {lo:.0f}-{hi:.0f}" for a, (lo, hi) in intervals.items()) + ")\n")
    print("| TR s | design | simulated noise | fitted with | A: p<0.05 | A: p<0.001 | A-B: p<0.05 | A-B: p<0.001 |")
    print("|---|---|---|---|---|---|---|---|")
    outside = {m: 0 for m in ("arp", "ar1")}
    cell = 0
    for tr in ch.TRS_S:
        for kind in ch.DESIGNS:
            for simulated in ch.NOISES:
                cell += 1
                for fitted in ("arp", "ar1"):
                    res = ch.null_cell(simulated, kind, tr, fitted, grid, seed=1000 + cell)
                    texts = []
                    for c in ("A", "A-B"):
                        for a in ALPHAS:
                            k = ch.false_positives(res.t[c], res.dof, a)
                            lo, hi = intervals[a]
                            outside[fitted] += not lo <= k <= hi
                            texts.append(rate_text(k, v, a))
                    print(f"| {tr} | {kind} | {simulated} | {fitted} | " + " | ".join(texts) + " |", flush=True)
    n_checks = cell * 4
    print(f"\nRates outside their 95 % interval: arp {outside['arp']} of {n_checks}, ar1 {outside['ar1']} of "
          f"{n_checks} (about {0.05 * n_checks:.0f} expected by chance for a calibrated model).")


def section_short_tr(grid: tuple[int, int, int]) -> None:
    v = int(np.prod(grid))
    lo, hi = ch.binomial_interval(v, 0.001)
    print(f"\n## Short TR, AR(1) nulls, 300 volumes, 6 censored volumes ({v} voxels per cell; p < 0.001 "
          f"interval {lo:.0f}-{hi:.0f})\n")
    print("| TR s | rho | design | model | A: p<0.001 (z SD) | A-B: p<0.001 (z SD) | A: p<0.05 | A-B: p<0.05 |")
    print("|---|---|---|---|---|---|---|---|")
    cell = 0
    for tr in (0.7, 0.8, 1.0):
        for rho in (0.2, 0.35, 0.5):
            ch.NOISES[f"AR(1) {rho}"] = ((rho,), 0.0)
            for kind in ch.DESIGNS:
                cell += 1
                for model in ("arp", "ar1"):
                    X, roles = ch.make_design(kind, tr, seed=cell, spikes=6)
                    rng = np.random.default_rng(2000 + cell)
                    Y = (100.0 + ch.simulate_noise(f"AR(1) {rho}", X.shape[0], v, rng)).astype(np.float32)
                    res = ch.fit_cell(Y, X, roles, model, grid)
                    cols = [f"{rate_text(ch.false_positives(res.t[c], res.dof, 0.001), v, 0.001)} "
                            f"({z_sd(res.t[c], res.dof):.3f})" for c in ("A", "A-B")]
                    cols += [rate_text(ch.false_positives(res.t[c], res.dof, 0.05), v, 0.05) for c in ("A", "A-B")]
                    print(f"| {tr} | {rho} | {kind} | {model} | " + " | ".join(cols) + " |", flush=True)


def section_bias(grid: tuple[int, int, int]) -> None:
    v = int(np.prod(grid))
    print(f"\n## AR estimates against the truth ({v} voxels, TR 2 s block design; z = (mean - true) / MC SE)\n")
    print("| noise | order | lag | true | per-voxel mean (z) | used by the fit: mean (z) |")
    print("|---|---|---|---|---|---|")
    for noise, order in (("AR(1) 0.5", 1), ("AR(1) 0.5", 8), ("AR(2) 0.5, 0.2", 2), ("AR(2) 0.5, 0.2", 8),
                         ("AR(1) 0.8 + white", 8)):
        rng = np.random.default_rng(3000 + order)
        X, roles = ch.make_design("block", 2.0)
        d = est.prepare_design(X, roles)
        Y = ch.simulate_noise(noise, X.shape[0], v, rng)
        a = est.compute_lag_products(est.fit_ols(d, Y).residuals, order)
        e = fitting.estimate_noise(a, d, fitting.VoxelGrid(grid, np.arange(v), np.full(3, ch.VOXEL_MM)))
        phi_voxel = est.levinson_durbin(e.acf)[0]
        res = ch.fit_cell((100.0 + Y).astype(np.float32), X, roles, "arp" if order > 1 else "ar1", grid,
                          order=order)
        used = res.fit.ar_coef.astype(np.float64).T
        true_phi = np.zeros(order)
        phi = ch.NOISES[noise][0]
        if ch.NOISES[noise][1] == 0.0:
            true_phi[:len(phi)] = phi
        else:
            true_phi[:] = np.nan       # AR(1) plus white noise is not an AR(p): compare the autocorrelations
        r = ch.true_acf(noise, order + 1)[1:]
        for k in range(order):
            se_r = e.acf[k].std() / np.sqrt(v)
            se_phi = phi_voxel[k].std() / np.sqrt(v)
            acf_text = f"acf {e.acf[k].mean():.4f} ({(e.acf[k].mean() - r[k]) / se_r:+.1f})"
            used_text = (f"phi {used[k].mean():.4f} ({(used[k].mean() - true_phi[k]) / se_phi:+.1f})"
                         if np.isfinite(true_phi[k]) else f"phi {used[k].mean():.4f}")
            truth = f"acf {r[k]:.4f}" + (f", phi {true_phi[k]:.4f}" if np.isfinite(true_phi[k]) else "")
            print(f"| {noise} | {order} | {k + 1} | {truth} | {acf_text} | {used_text} |", flush=True)


def section_power(grid: tuple[int, int, int]) -> None:
    v = int(np.prod(grid))
    print(f"\n## Power at a fixed true false-positive rate ({v} voxels: half null, half with a planted effect "
          "on A; thresholds = the model's own null quantiles)\n")
    print("| TR s | design | noise | effect | model | sensitivity at true FPR 0.001 | at 0.05 |")
    print("|---|---|---|---|---|---|---|")
    for tr, kind, noise in ((2.0, "block", "AR(1) 0.8 + white"), (0.8, "block", "AR(1) 0.8 + white"),
                            (2.0, "event", "AR(1) 0.8 + white"), (2.0, "block", "AR(1) 0.5"),
                            (0.8, "event", "AR(2) 0.5, 0.2")):
        rng = np.random.default_rng(4000)
        X, roles = ch.make_design(kind, tr)
        Y = ch.simulate_noise(noise, X.shape[0], v, rng)
        signal = (np.arange(v) % 2).astype(bool)
        effect = 0.6 if kind == "block" else 1.5
        Y[:, signal] += effect * X[:, [0]]
        Y = (100.0 + Y).astype(np.float32)
        for model in ("arp", "ar1"):
            res = ch.fit_cell(Y, X, roles, model, grid)
            t = np.abs(res.t["A"])
            sens = [float(np.mean(t[signal] > np.quantile(t[~signal], 1 - a))) for a in (0.001, 0.05)]
            print(f"| {tr} | {kind} | {noise} | {effect} | {model} | {sens[0]:.4f} | {sens[1]:.4f} |", flush=True)


def section_edge(grid: tuple[int, int, int]) -> None:
    print("\n## A patch of AR(1) 0.5 noise in AR(1) 0.1 noise (TR 2 s block, default 6 mm smoothing)\n")
    print("| tissue map | model | patch: p<0.001 | border (2 voxels): p<0.001 | outside: p<0.001 | patch: p<0.05 "
          "| lag-1 of the models: patch border (inside) / outside border |")
    print("|---|---|---|---|---|---|---|")
    shape = grid
    v = int(np.prod(shape))
    ii = np.indices(shape)
    centre = np.array(shape)[:, None, None, None] / 2
    dist = np.max(np.abs(ii - centre) / (np.array(shape)[:, None, None, None] / 4), axis=0)
    patch = (dist <= 1).ravel()                       # a box of half the grid in each dimension
    from scipy.ndimage import binary_dilation, binary_erosion
    p3 = patch.reshape(shape)
    border = (binary_dilation(p3, iterations=2) & ~binary_erosion(p3, iterations=2)).ravel()
    X, roles = ch.make_design("block", 2.0)
    rng = np.random.default_rng(5000)
    ch.NOISES["AR(1) 0.1"] = ((0.1,), 0.0)
    Y = ch.simulate_noise("AR(1) 0.1", X.shape[0], v, rng)
    Y[:, patch] = ch.simulate_noise("AR(1) 0.5", X.shape[0], int(patch.sum()), rng)
    Y = (100.0 + Y).astype(np.float32)
    for tissue in (False, True):
        for model in ("arp", "ar1"):
            res = ch.fit_cell(Y, X, roles, model, shape, classes=patch.astype(np.int64) if tissue else None)
            p = 2.0 * scipy.stats.t.sf(np.abs(res.t["A-B"]), res.dof)
            cells = [f"{np.mean(p[m] < 0.001):.5f} ({int(m.sum())})" for m in (patch & ~border, border, ~patch & ~border)]
            rho = res.fit.bin_rho[res.fit.bin]
            inner, outer = border & patch, border & ~patch
            print(f"| {'yes' if tissue else 'no'} | {model} | " + " | ".join(cells)
                  + f" | {np.mean(p[patch & ~border] < 0.05):.4f} | {rho[inner].mean():.3f} / {rho[outer].mean():.3f} |",
                  flush=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--grid", type=int, nargs=3, default=(40, 50, 50), help="voxel grid of each cell")
    ap.add_argument("--sections", nargs="+", default=["null", "short_tr", "bias", "power", "edge"])
    args = ap.parse_args()
    grid = tuple(args.grid)
    t0 = time.perf_counter()
    for name in args.sections:
        globals()[f"section_{name}"](grid)
    print(f"\n(total {time.perf_counter() - t0:.0f} s)")


if __name__ == "__main__":
    main()
