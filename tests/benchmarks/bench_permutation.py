"""Benchmark (not a test): permutation inference at a realistic group size.

5,000 sign flips, 40 subjects, 50,000 voxels, max-t and cluster mass. Prints
the seconds of each part and their ratio to one ordinary group OLS fit
measured in the same run. Run by hand:

    PYTHONPATH=. /work/venv/bin/python tests/benchmarks/bench_permutation.py [n_permutations]
"""

from __future__ import annotations

import sys
import time

import numpy as np
from scipy import ndimage, stats

from glmsteps import group as gm
from glmsteps import permutation as pm


def main(n_permutations: int = 5000) -> None:
    n_subjects, n_voxels = 40, 50_000
    shape = (40, 40, 32)                                  # 51,200 grid voxels; the first 50,000 are analysed
    rng = np.random.default_rng(0)
    sigma = 2.0 / np.sqrt(8 * np.log(2))                   # 2-voxel FWHM smoothness
    Y = np.stack([ndimage.gaussian_filter(rng.normal(size=shape), sigma).reshape(-1)[:n_voxels]
                  for _ in range(n_subjects)])
    Y /= Y.std(axis=0, keepdims=True)
    X = np.ones((n_subjects, 1))
    c = np.array([1.0])
    voxel_index = np.arange(n_voxels)
    threshold = float(stats.t.isf(0.001, n_subjects - 1))

    start = time.perf_counter()
    gm.fit_ols_contrast(X, Y, c)
    one_fit = time.perf_counter() - start

    # statistic only: the blocked matrix products of pm.run_permutation_test, without clusters
    start = time.perf_counter()
    model = pm.build_freedman_lane(X, c)
    flips = pm.make_sign_flips(np.arange(n_subjects), n_permutations, seed=1)
    total_ss = np.einsum("nv,nv->v", Y, Y)
    zero = np.zeros(n_voxels)
    block = max(1, int(64 * 2**20 // (8 * 2 * n_voxels * 2)))
    for s in range(0, n_permutations, block):
        ops = pm.permutation_operators(model, "sign_flip", flips[s:s + block])
        np.nanmax(pm.t_from_operators(model, ops, Y, zero, total_ss), axis=1)
    stat_only = time.perf_counter() - start

    start = time.perf_counter()
    result = pm.run_permutation_test(X, Y, c, voxel_index, shape, "sign_flip", n_permutations, seed=1,
                                     cluster_threshold=threshold)
    full = time.perf_counter() - start

    print(f"{'part':<38}{'seconds':>10}{'x one fit':>12}")
    print(f"{'one group OLS fit (40 x 50,000)':<38}{one_fit:>10.3f}{1.0:>12.1f}")
    print(f"{'max-t only, ' + str(n_permutations) + ' sign flips':<38}{stat_only:>10.2f}{stat_only / one_fit:>12.0f}")
    print(f"{'max-t + cluster extent/mass':<38}{full:>10.2f}{full / one_fit:>12.0f}")
    print(f"{'cluster labelling share':<38}{(full - stat_only) / full:>10.0%}")
    print(f"min voxel FWE p = {np.nanmin(result.p_fwe):.4f} (>= 1/{n_permutations}); "
          f"{result.extent.size} observed clusters")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 5000)
