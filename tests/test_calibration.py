"""Calibration of the run-level autocorrelation models on simulated nulls (the fast subset; the full table is
tests/benchmarks/bench_calibration.py).

Simulations: tests/calibration_helpers.py (300 volumes, block and event designs, 128 s cosine drift,
spatially independent stationary noise from statsmodels ArmaProcess on a grid of 3 mm voxels, fitted
with glmsteps.fitting.fit_voxels and the fit step's defaults). Every tolerance is derived from the
simulation size: false-positive counts against the central binomial interval of the nominal rate at
the simulated voxel count (reference: scipy.stats.binom), means against their Monte-Carlo standard
error. Several checks share one test module, so the intervals are family-wise: each of the K checks
of a family uses the 1 - 0.05 / K interval (Bonferroni), which keeps the chance of any false alarm
in the family at 5 % or less; K is stated next to each family.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

import calibration_helpers as ch
from glmsteps import estimation as est
from glmsteps import fitting

GRID = (30, 40, 50)                       # 60,000 voxels per null cell
V = int(np.prod(GRID))
ALPHAS = (0.05, 0.001)

# family 1: the null cells below x 2 contrasts x 2 alphas, for the default model
NULL_CELLS = [
    ("AR(1) 0.8 + white", "block", 2.0, 11),
    ("AR(1) 0.8 + white", "block", 0.8, 12),
    ("AR(2) 0.5, 0.2", "block", 0.8, 13),
    ("AR(1) 0.5", "event", 0.8, 14),
    ("white", "event", 2.0, 15),
    ("AR(1) 0.3", "block", 2.0, 16),
]
K_NULL = len(NULL_CELLS) * 2 * len(ALPHAS)


def family_interval(v: int, alpha: float, k: int) -> tuple[float, float]:
    """Binomial interval of the false-positive count at family-wise level 95 % over k checks."""
    return ch.binomial_interval(v, alpha, level=1.0 - 0.05 / k)


@pytest.mark.slow
@pytest.mark.parametrize("noise, design, tr_s, seed", NULL_CELLS)
def test_default_model_is_calibrated_on_nulls(noise: str, design: str, tr_s: float, seed: int) -> None:
    res = ch.null_cell(noise, design, tr_s, "arp", GRID, seed)
    for contrast in ("A", "A-B"):
        for alpha in ALPHAS:
            lo, hi = family_interval(V, alpha, K_NULL)
            count = ch.false_positives(res.t[contrast], res.dof, alpha)
            assert lo <= count <= hi, (contrast, alpha, count, (lo, hi))


@pytest.mark.slow
def test_ar1_is_liberal_on_ar1_plus_white_block_designs() -> None:
    # the defect this autocorrelation model fixes, and proof that the check above can fail: AR(1) on AR(1) + white
    # noise is far outside even the family-wise interval at p < 0.001 (about 10x nominal)
    res = ch.null_cell("AR(1) 0.8 + white", "block", 2.0, "ar1", GRID, seed=11)
    lo, hi = family_interval(V, 0.001, K_NULL)
    assert ch.false_positives(res.t["A-B"], res.dof, 0.001) > 3 * hi


# family 2 (issue 14: short TR, AR(1) nulls, censored volumes): 2 cells x 2 models x 2 contrasts = 8 checks at p < 0.001
SHORT_TR_CELLS = [(0.7, 0.35, "block", 21), (1.0, 0.5, "event", 22)]
K_SHORT = len(SHORT_TR_CELLS) * 2 * 2


@pytest.mark.slow
@pytest.mark.parametrize("tr_s, rho, design, seed", SHORT_TR_CELLS)
def test_short_tr_ar1_nulls_with_censoring_are_calibrated(tr_s: float, rho: float, design: str, seed: int) -> None:
    X, roles = ch.make_design(design, tr_s, seed=seed, spikes=6)
    rng = np.random.default_rng(seed)
    ch.NOISES[f"AR(1) {rho}"] = ((rho,), 0.0)
    Y = (100.0 + ch.simulate_noise(f"AR(1) {rho}", X.shape[0], V, rng)).astype(np.float32)
    lo, hi = family_interval(V, 0.001, K_SHORT)
    for model in ("arp", "ar1"):
        res = ch.fit_cell(Y, X, roles, model, GRID)
        for contrast in ("A", "A-B"):
            count = ch.false_positives(res.t[contrast], res.dof, 0.001)
            assert lo <= count <= hi, (model, contrast, count, (lo, hi))


# family 3: AR estimates, one check per lag: 1 + 8 + 2 + 8 = 19 per-voxel checks and 19 checks of the
# coefficients the fit uses
BIAS_CASES = [("AR(1) 0.5", 1), ("AR(1) 0.5", 8), ("AR(2) 0.5, 0.2", 2), ("AR(2) 0.5, 0.2", 8)]
K_BIAS = 2 * sum(order for _, order in BIAS_CASES)
Z_BIAS = float(scipy.stats.norm.isf(0.05 / K_BIAS / 2))   # two-sided, family-wise 95 %: about 3.2


@pytest.mark.slow
@pytest.mark.parametrize("noise, order", BIAS_CASES)
def test_ar_estimates_are_unbiased_at_every_lag(noise: str, order: int) -> None:
    grid = (20, 25, 40)                   # 20,000 voxels: Monte-Carlo SE of a mean about 0.0004
    v = int(np.prod(grid))
    rng = np.random.default_rng(300 + order)
    X, roles = ch.make_design("block", 2.0)
    design = est.prepare_design(X, roles)
    Y = ch.simulate_noise(noise, X.shape[0], v, rng)
    lags = est.compute_lag_products(est.fit_ols(design, Y).residuals, order)
    vgrid = fitting.VoxelGrid(grid, np.arange(v), np.full(3, ch.VOXEL_MM))
    acf = fitting.estimate_noise(lags, design, vgrid).acf
    truth = ch.true_acf(noise, order + 1)[1:]
    se = acf.std(axis=1) / np.sqrt(v)
    assert np.all(np.abs(acf.mean(axis=1) - truth) < Z_BIAS * se), (acf.mean(axis=1) - truth) / se
    # the AR coefficients the fit whitens with (each voxel's bin model after 5 mm smoothing); their
    # Monte-Carlo SE is taken from the per-voxel Yule-Walker coefficients they average
    res = ch.fit_cell((100.0 + Y).astype(np.float32), X, roles, "arp" if order > 1 else "ar1", grid, order=order)
    used = res.fit.ar_coef.astype(np.float64).T
    phi = np.zeros(order)
    phi[:len(ch.NOISES[noise][0])] = ch.NOISES[noise][0]
    se_phi = est.levinson_durbin(acf)[0].std(axis=1) / np.sqrt(v)
    assert np.all(np.abs(used.mean(axis=1) - phi) < Z_BIAS * se_phi), (used.mean(axis=1) - phi) / se_phi


@pytest.mark.slow
def test_uncorrected_ratio_bias_would_be_detected() -> None:
    # the check above can fail: Worsley's correction alone (truncated at the model order, no ratio terms)
    # is biased by many Monte-Carlo SE on the same simulation
    grid = (20, 25, 40)
    v = int(np.prod(grid))
    X, roles = ch.make_design("block", 2.0)
    design = est.prepare_design(X, roles)
    Y = ch.simulate_noise("AR(2) 0.5, 0.2", X.shape[0], v, np.random.default_rng(302))
    lags = est.compute_lag_products(est.fit_ols(design, Y).residuals, 2)
    first = est.truncated_autocorrelation(lags, est.compute_lag_moments(design, 2))
    se = first.std(axis=1) / np.sqrt(v)
    assert np.all(np.abs(first.mean(axis=1) - ch.true_acf("AR(2) 0.5, 0.2", 3)[1:]) > 2 * Z_BIAS * se)


# family 4: sensitivity at a fixed true false-positive rate, 2 cases x 2 rates = 4 one-sided checks
POWER_CASES = [("AR(1) 0.8 + white", "block", 2.0, 0.45, 0.0), ("AR(1) 0.5", "event", 2.0, 1.2, 0.01)]
Z_POWER = float(scipy.stats.norm.isf(0.05 / 4))


@pytest.mark.slow
@pytest.mark.parametrize("noise, design, tr_s, effect, margin", POWER_CASES)
def test_default_model_is_at_least_as_sensitive_as_ar1(noise: str, design: str, tr_s: float, effect: float,
                                                       margin: float) -> None:
    # half the voxels carry a planted effect on A; the threshold of each model is the quantile of its own
    # null voxels that gives the true false-positive rate, so the comparison is at equal true FPR.
    # On AR(1) plus white noise (AR(1) misspecified) the default must be at least as sensitive; on AR(1)
    # noise, where AR(1) is the true model, it can only match it, and is allowed to fall short by at most
    # 1 % of AR(1)'s sensitivity (measured: 0.5 % at true FPR 0.05, tests/benchmarks/bench_calibration.py)
    rng = np.random.default_rng(400)
    X, roles = ch.make_design(design, tr_s)
    Y = ch.simulate_noise(noise, X.shape[0], V, rng)
    signal = (np.arange(V) % 2).astype(bool)
    Y[:, signal] += effect * X[:, [0]]
    Y = (100.0 + Y).astype(np.float32)
    hits = {}
    for model in ("arp", "ar1"):
        t = np.abs(ch.fit_cell(Y, X, roles, model, GRID).t["A"])
        hits[model] = [t[signal] > np.quantile(t[~signal], 1.0 - a) for a in (0.01, 0.05)]
    for k in range(2):
        diff = hits["arp"][k].astype(float) - hits["ar1"][k].astype(float)
        # paired difference of the two models on the same voxels; its SE from the voxels
        se = diff.std() / np.sqrt(diff.size)
        assert diff.mean() > -Z_POWER * se - margin * hits["ar1"][k].mean(), \
            (k, hits["arp"][k].mean(), hits["ar1"][k].mean())


@pytest.mark.slow
def test_tissue_map_keeps_a_sharp_change_of_autocorrelation_apart() -> None:
    # a box of AR(1) 0.5 noise in AR(1) 0.1 noise, 5 mm smoothing (3 mm voxels); the voxels of the box
    # next to its edge are where smoothing blends
    shape = (24, 24, 24)
    v = int(np.prod(shape))
    ii = np.indices(shape)
    box = np.all((ii >= 6) & (ii < 18), axis=0)
    edge = box & ~np.all((ii >= 7) & (ii < 17), axis=0)
    X, roles = ch.make_design("block", 2.0)
    rng = np.random.default_rng(500)
    ch.NOISES["AR(1) 0.1"] = ((0.1,), 0.0)
    Y = ch.simulate_noise("AR(1) 0.1", X.shape[0], v, rng)
    Y[:, box.ravel()] = ch.simulate_noise("AR(1) 0.5", X.shape[0], int(box.sum()), rng)
    Y = (100.0 + Y).astype(np.float32)
    lag1, raw = {}, None
    for tissue in (False, True):
        res = ch.fit_cell(Y, X, roles, "arp", shape, classes=box.ravel().astype(np.int64) if tissue else None)
        lag1[tissue] = res.fit.bin_rho[res.fit.bin].reshape(shape)[edge]
        raw = res.fit.lag1.astype(np.float64).reshape(shape)[edge]
    # with the map, the edge voxels' models keep the box's 0.5: their mean is within 4 SE, the SE of a mean
    # of the unsmoothed estimates of the edge voxels (smoothing within the box averages at least as many)
    se = raw.std() / np.sqrt(edge.sum())
    assert abs(lag1[True].mean() - 0.5) < 4 * se
    # without it they are pulled toward the outside's 0.1 (the documented trade-off of smoothing)
    assert lag1[False].mean() < 0.5 - 0.05
