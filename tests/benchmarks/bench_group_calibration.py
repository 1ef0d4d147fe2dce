"""Calibration of the group-level mixed-effects inference on simulated nulls (a report; asserts nothing).

Run from the repository folder:  PYTHONPATH=. python tests/benchmarks/bench_group_calibration.py [--voxels N]

For each number of subjects n, spread of the subjects' first-level variances (each subject's level
drawn uniform on [a, b], b / a = 2, 4 or 10, times a per-voxel factor uniform on [0.7, 1.3]) and
between-subject variance tau^2 in {0, 0.5, 2} (first-level variances are about 1), N independent null
voxels are fitted and the two-sided false-positive counts at p < 0.001 and p < 0.05 are printed for

- ``hk``: REML tau^2, Hartung-Knapp variance, t on n - p dof (the workflow's mixed models);
- ``known``: REML tau^2 treated as known, variance c'(X'WX)^-1 c, t on n - p dof (glmsteps before);
- ``robust``: REML tau^2, HC2 variance, Satterthwaite dof (Bell & McCaffrey 2002);
- ``ols``: the OLS t on the effects alone (summary statistics);

for the mean of a one-sample design and for the slope of a regression on a normal covariate. The
95 % binomial interval of the count under the nominal rate is printed with each block.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy import stats

from glmsteps import group as gm
from glmsteps import stats as glm_stats


def counts(X: np.ndarray, Y: np.ndarray, V: np.ndarray, c: np.ndarray) -> dict[str, tuple[int, int]]:
    n, p = X.shape
    tau2 = gm.estimate_between_variance_reml(X, Y, V).tau2
    W = 1.0 / (V + tau2)
    fit = gm.weighted_fit(X, Y, W)
    effect = c @ fit.beta
    model_var = fit.contrast_variance(c)
    out: dict[str, tuple[int, int]] = {}
    robust_var, robust_dof = gm.robust_contrast_variance(fit, c)
    ols = gm.fit_ols_contrast(X, Y, c)
    for name, t, dof in (("hk", effect / np.sqrt(fit.ypy / (n - p) * model_var), n - p),
                         ("known", effect / np.sqrt(model_var), n - p),
                         ("robust", effect / np.sqrt(robust_var), robust_dof),
                         ("ols", ols.t, ols.dof)):
        pv = glm_stats.t_pvalue(t, dof, "two-sided")
        out[name] = (int(np.sum(pv < 0.001)), int(np.sum(pv < 0.05)))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--voxels", type=int, default=100_000, help="null voxels per cell")
    parser.add_argument("--subjects", type=int, nargs="+", default=[10, 20, 40])
    args = parser.parse_args()
    n_vox = args.voxels
    low, high = stats.binom.interval(0.95, n_vox, 0.001)
    print(f"{n_vox} null voxels per cell; 95 % interval of the count at p < 0.001: [{low:.0f}, {high:.0f}] "
          f"(expected {n_vox * 0.001:.0f}); counts at p < 0.05 expected {n_vox * 0.05:.0f}")
    print(f"{'n':>3} {'design':>10} {'spread':>6} {'tau2':>5}  " + "  ".join(f"{m:>15}" for m in
                                                                         ("hk", "known", "robust", "ols")))
    for n in args.subjects:
        for design in ("one_sample", "regression"):
            for spread, (a, b) in (("2x", (0.7, 1.4)), ("4x", (0.5, 2.0)), ("10x", (0.2, 2.0))):
                for tau2 in (0.0, 0.5, 2.0):
                    rng = np.random.default_rng(1000 * n + 100 * int(10 * tau2) + len(spread) + (design == "regression"))
                    if design == "one_sample":
                        X, c = np.ones((n, 1)), np.array([1.0])
                    else:
                        X, c = np.column_stack([np.ones(n), rng.normal(size=n)]), np.array([0.0, 1.0])
                    V = rng.uniform(a, b, size=(n, 1)) * rng.uniform(0.7, 1.3, size=(n, n_vox))
                    Y = rng.normal(size=(n, n_vox)) * np.sqrt(V + tau2)
                    start = time.perf_counter()
                    result = counts(X, Y, V, c)
                    cells = "  ".join(f"{k:>5} {'(' + format(k / (n_vox * 0.001), '.2f') + 'x)':>9}"
                                      for k, _ in result.values())
                    print(f"{n:>3} {design:>10} {spread:>6} {tau2:>5}  {cells}   "
                          f"[{time.perf_counter() - start:.0f} s]", flush=True)


if __name__ == "__main__":
    main()
