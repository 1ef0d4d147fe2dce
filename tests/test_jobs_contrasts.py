"""Tests of the contrast, combine_runs and threshold jobs on tiny files."""

from __future__ import annotations

import json
import sys
import types
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats as sps

from glmsteps.errors import ContrastError, DataError
from glmsteps.fileio import read_tsv, save_nifti, write_json, write_tsv
from glmsteps.jobs import combine_runs as combine_job
from glmsteps.jobs import contrast as contrast_job
from glmsteps.jobs import threshold as threshold_job

SHAPE = (6, 5, 4)
AFFINE = np.array([[-3.0, 0, 0, 9], [0, 3.0, 0, -6], [0, 0, 3.5, 2], [0, 0, 0, 1]])
NAMES = ["A", "B", "drift_1", "intercept"]
CONDS = ["A", "B", "", ""]
BASIS = ["main", "main", "", ""]
ROLES = ["interest", "interest", "drift", "intercept"]


# ---------------------------------------------------------------------------------------------
# A fit.h5 written by hand with h5py, following the DEVELOPERS.md layout
# ---------------------------------------------------------------------------------------------

def _design(n: int, zero_b: bool = False) -> np.ndarray:
    t = np.arange(n)
    X = np.column_stack([(t % 12 < 4).astype(float), ((t + 6) % 12 < 4).astype(float), (t - n / 2) / n, np.ones(n)])
    if zero_b:
        X[:, 1] = 0.0
    return X


def _write_fit(path: Path, seed: int = 0, n: int = 48, zero_b: bool = False, excluded: bool = False,
               signal: float = 1.0) -> dict:
    rng = np.random.default_rng(seed)
    X = _design(n, zero_b)
    voxel_index = np.flatnonzero(rng.uniform(size=int(np.prod(SHAPE))) < 0.5)
    v = voxel_index.size
    beta_true = rng.normal(size=(4, v)) * signal
    Y = X @ beta_true + rng.normal(size=(n, v))
    beta, *_ = np.linalg.lstsq(X, Y, rcond=None)
    rank = np.linalg.matrix_rank(X)
    s2 = ((Y - X @ beta) ** 2).sum(0) / (n - rank)
    Xp = np.linalg.pinv(X)
    with h5py.File(path, "w") as h5:
        h5.attrs.update({"provenance": json.dumps({"step": "fit", "lineage_hash": "0" * 64}), "step": "fit",
                         "params_hash": "0" * 64, "lineage_hash": "0" * 64, "glmsteps_version": "0.1.0",
                         "excluded": excluded, "autocorrelation": "ols", "scaling": "none", "repetition_time_s": 2.0})
        h5["grid/shape"] = np.array(SHAPE, dtype=np.int64)
        h5["grid/affine"] = AFFINE
        h5["voxels/index"] = voxel_index.astype(np.int64)
        h5.create_group("voxels/status_counts").attrs.update({"outside_mask": int(np.prod(SHAPE)) - v, "non_finite": 0,
                                                 "zero_variance": 0, "fitted": v})
        h5["design/matrix"] = X
        for key, values in (("names", NAMES), ("roles", ROLES), ("conditions", CONDS), ("basis", BASIS)):
            h5.create_dataset(f"design/{key}", data=np.array(values, dtype=object), dtype=h5py.string_dtype())
        h5["estimates/beta"] = beta.astype(np.float32)
        h5["estimates/residual_variance"] = s2.astype(np.float32)
        h5["estimates/dof"] = np.full(v, n - rank, dtype=np.float32)
        h5["noise/ar_coef"] = np.zeros((v, 1), dtype=np.float32)
        h5["noise/bin"] = np.zeros(v, dtype=np.int32)
        h5["noise/bin_covariance"] = (Xp @ Xp.T)[None]
        h5["noise/bin_rho"] = np.zeros(1)
        h5["images/mean"] = rng.uniform(50, 100, size=SHAPE).astype(np.float32)
    return {"X": X, "Y": Y, "voxel_index": voxel_index, "dof": n - rank}


@dataclass
class _ShimFit:
    shape: tuple
    affine: np.ndarray
    voxel_index: np.ndarray
    design: np.ndarray
    names: list
    roles: list
    conditions: list
    basis: list
    beta: np.ndarray
    residual_variance: np.ndarray
    dof: np.ndarray
    ar_coef: np.ndarray
    bin: np.ndarray
    bin_covariance: np.ndarray
    bin_rho: np.ndarray
    mean_image: np.ndarray
    excluded: bool
    attrs: dict = field(default_factory=dict)


def _shim_read_fit(path):
    """Test-only reader of the DEVELOPERS.md layout, used while glmsteps.fitstore is not merged."""
    with h5py.File(path, "r") as h5:
        text = [[s.decode() if isinstance(s, bytes) else str(s) for s in h5[f"design/{k}"][()]]
                for k in ("names", "roles", "conditions", "basis")]
        return _ShimFit(tuple(int(s) for s in h5["grid/shape"][()]), h5["grid/affine"][()], h5["voxels/index"][()],
                        h5["design/matrix"][()], *text, h5["estimates/beta"][()],
                        h5["estimates/residual_variance"][()], h5["estimates/dof"][()], h5["noise/ar_coef"][()],
                        h5["noise/bin"][()], h5["noise/bin_covariance"][()], h5["noise/bin_rho"][()],
                        h5["images/mean"][()], bool(h5.attrs["excluded"]), dict(h5.attrs))


@pytest.fixture(autouse=True)
def _fitstore(monkeypatch):
    try:
        import glmsteps.fitstore  # noqa: F401
    except ImportError:
        shim = types.ModuleType("glmsteps.fitstore")
        shim.read_fit = _shim_read_fit
        monkeypatch.setitem(sys.modules, "glmsteps.fitstore", shim)


def _outputs(folder: Path, keys) -> dict:
    return {k: str(folder / f"{k}.nii.gz") for k in keys}


def _load(path) -> np.ndarray:
    return np.asarray(nib.load(path).dataobj, dtype=np.float64)


WILD = {"subject": "01", "run_id": "task-gamble_run-1", "contrast": "a_vs_b"}


# ---------------------------------------------------------------------------------------------
# contrast
# ---------------------------------------------------------------------------------------------

def test_contrast_job_t_maps_match_statsmodels(tmp_path):
    sim = _write_fit(tmp_path / "fit.h5")
    out = _outputs(tmp_path / "contrast-a_vs_b", ("effect", "variance", "t", "z", "p"))
    params = {"name": "a_vs_b", "definition": {"weights": {"A": 1, "B": -1}}, "tail": "positive",
              "skip_nonestimable": False}
    contrast_job.run({"fit": str(tmp_path / "fit.h5")}, out, params, WILD)
    maps = {k: _load(v).ravel() for k, v in out.items()}
    inside = np.zeros(int(np.prod(SHAPE)), bool)
    inside[sim["voxel_index"]] = True
    assert np.isnan(maps["t"][~inside]).all() and np.isfinite(maps["t"][inside]).all()
    c = [1.0, -1.0, 0.0, 0.0]
    for col in (0, 7, len(sim["voxel_index"]) - 1):
        res = sm.OLS(sim["Y"][:, col], sim["X"]).fit()
        # reference: statsmodels OLS t_test (maps are float32: relative tolerance 1e-5)
        tt = res.t_test(c)
        vox = sim["voxel_index"][col]
        assert maps["t"][vox] == pytest.approx(float(tt.tvalue[0, 0]), rel=1e-5)
        assert maps["effect"][vox] == pytest.approx(float(tt.effect[0]), rel=1e-5, abs=1e-6)
        assert maps["variance"][vox] == pytest.approx(float(tt.sd[0, 0]) ** 2, rel=1e-5)
        # reference: scipy.stats.t upper tail and norm.isf for the one-sided p and z
        assert maps["p"][vox] == pytest.approx(sps.t.sf(tt.tvalue[0, 0], sim["dof"]), rel=1e-4)
        assert maps["z"][vox] == pytest.approx(sps.norm.isf(sps.t.sf(tt.tvalue[0, 0], sim["dof"])), rel=1e-4,
                                               abs=1e-5)
    side = json.loads(Path(out["z"].replace(".nii.gz", ".json")).read_text())
    assert side["map"] == {"level": "run", "subject": "01", "session": "", "task": "gamble", "run": "1",
                           "contrast": "a_vs_b", "stat": "z"}
    assert side["step"] == "contrast" and side["estimable"] is True and side["dof"] == sim["dof"]
    # reference: Dale (1999) efficiency 1 / (c (X'X)^-1 c'), numpy solve
    X = sim["X"]
    cc = np.array(c)
    assert side["efficiency"] == pytest.approx(1 / (cc @ np.linalg.solve(X.T @ X, cc)), rel=1e-9)


def test_contrast_job_f_maps_match_statsmodels(tmp_path):
    sim = _write_fit(tmp_path / "fit.h5", seed=1)
    out = _outputs(tmp_path / "contrast-eff", ("f", "z", "p"))
    params = {"name": "effects", "definition": {"rows": [{"A": 1}, {"B": 1}]}, "tail": None,
              "skip_nonestimable": False}
    contrast_job.run({"fit": str(tmp_path / "fit.h5")}, out, params, WILD)
    f = _load(out["f"]).ravel()
    C = np.array([[1.0, 0, 0, 0], [0, 1.0, 0, 0]])
    for col in (0, 5):
        # reference: statsmodels OLS f_test
        ft = sm.OLS(sim["Y"][:, col], sim["X"]).fit().f_test(C)
        assert f[sim["voxel_index"][col]] == pytest.approx(float(ft.fvalue), rel=1e-5)
    side = json.loads((tmp_path / "contrast-eff" / "f.json").read_text())
    assert side["kind"] == "F" and side["dof1"] == 2 and side["map"]["stat"] == "f"


def test_contrast_job_not_estimable_is_one_line_error_and_writes_nothing(tmp_path):
    _write_fit(tmp_path / "fit.h5", zero_b=True)
    out = _outputs(tmp_path / "c", ("effect", "variance", "t", "z", "p"))
    params = {"name": "a_vs_b", "definition": {"weights": {"A": 1, "B": -1}}, "tail": "two-sided",
              "skip_nonestimable": False}
    with pytest.raises(ContrastError) as info:
        contrast_job.run({"fit": str(tmp_path / "fit.h5")}, out, params, WILD)
    msg = str(info.value)
    assert "\n" not in msg and "'a_vs_b'" in msg and "task-gamble_run-1" in msg and "'B'" in msg
    assert not (tmp_path / "c").exists()
    contrast_job.run({"fit": str(tmp_path / "fit.h5")}, out, {**params, "skip_nonestimable": True}, WILD)
    assert np.isnan(_load(out["t"])).all()
    side = json.loads((tmp_path / "c" / "t.json").read_text())
    assert side["skipped"] is True and side["estimable"] is False and "'B'" in side["reason"]


def test_contrast_job_unknown_condition_is_one_line_error(tmp_path):
    _write_fit(tmp_path / "fit.h5")
    params = {"name": "bad", "definition": {"weights": {"C": 1}}, "tail": "two-sided", "skip_nonestimable": True}
    with pytest.raises(ContrastError) as info:
        contrast_job.run({"fit": str(tmp_path / "fit.h5")}, _outputs(tmp_path / "c", ("effect", "variance", "t",
                                                                                       "z", "p")), params, WILD)
    assert "\n" not in str(info.value) and "'C'" in str(info.value) and "['A', 'B']" in str(info.value)


def test_contrast_job_excluded_run_writes_nan_maps(tmp_path):
    _write_fit(tmp_path / "fit.h5", excluded=True)
    out = _outputs(tmp_path / "c", ("effect", "variance", "t", "z", "p"))
    params = {"name": "a", "definition": {"weights": {"A": 1}}, "tail": "two-sided", "skip_nonestimable": False}
    contrast_job.run({"fit": str(tmp_path / "fit.h5")}, out, params, WILD)
    assert all(np.isnan(_load(p)).all() for p in out.values())
    assert json.loads((tmp_path / "c" / "effect.json").read_text())["excluded"] is True


# ---------------------------------------------------------------------------------------------
# combine_runs
# ---------------------------------------------------------------------------------------------

COMBINE_PARAMS = {"name": "a_vs_b", "definition": {"weights": {"A": 1, "B": -1}}, "tail": "two-sided",
                  "skip_nonestimable": True}


F_PARAMS = {"name": "any_effect", "definition": {"rows": [{"A": 1}, {"B": 1}]}, "tail": None,
            "skip_nonestimable": True}


def test_combine_job_f_contrast_is_the_fixed_effects_f_over_runs(tmp_path):
    """Issue 14.3: F contrasts have subject-level maps (f, z, p), from the run fits."""
    from glmsteps.combine import fixed_effects_f
    from glmsteps.fitstore import read_fit

    fits, sims = [], []
    for i, seed in enumerate((40, 41, 42), start=1):
        fit = tmp_path / f"task-gamble_run-{i}" / "fit.h5"
        fit.parent.mkdir(parents=True)
        sims.append(_write_fit(fit, seed=seed, signal=0.3))
        fits.append(str(fit))
    out = _outputs(tmp_path / "combined", ("f", "z", "p"))
    combine_job.run({"fit": fits}, out, F_PARAMS, {"subject": "01", "contrast": "any_effect"})
    f_map = _load(out["f"]).ravel()
    side = json.loads((tmp_path / "combined" / "f.json").read_text())
    assert side["kind"] == "F" and side["dof1"] == 2 and side["dof"] == 3 * 44
    assert side["map"] == {"level": "subject", "subject": "01", "session": "", "task": "gamble", "run": "",
                           "contrast": "any_effect", "stat": "f"}
    # reference, by hand for each voxel: the runs' OLS estimates C b_r with covariance
    # s2_r C (X'X)^-1 C', combined by GLS (Searle 1971 sec. 5.5); F = theta' (sum P_r) theta / 2
    C = np.array([[1.0, 0, 0, 0], [0, 1.0, 0, 0]])
    runs = [read_fit(f) for f in fits]
    union = np.unique(np.concatenate([r.voxel_index for r in runs]))
    for vox in union[:25]:
        info, score, dof2 = np.zeros((2, 2)), np.zeros(2), 0.0
        for r, sim in zip(runs, sims):
            where = np.flatnonzero(r.voxel_index == vox)
            if not where.size:
                continue
            j = where[0]
            P = np.linalg.inv(float(r.residual_variance[j]) * C @ np.linalg.inv(sim["X"].T @ sim["X"]) @ C.T)
            info += P
            score += P @ (C @ r.beta[:, j].astype(np.float64))
            dof2 += sim["dof"]
        theta = np.linalg.solve(info, score)
        assert f_map[vox] == pytest.approx(theta @ info @ theta / 2, rel=1e-5)
        # reference: scipy.stats.f upper tail on (2, summed dof)
        assert _load(out["p"]).ravel()[vox] == pytest.approx(sps.f.sf(f_map[vox], 2, dof2), rel=1e-4)
    outside = np.setdiff1d(np.arange(f_map.size), union)
    assert np.isnan(f_map[outside]).all()


def _run_maps(tmp_path, seeds, zero_b_runs=()):
    """Fits of a few runs, and their run-level maps from the contrast job (the reference path)."""
    fits, effects, variances = [], [], []
    for i, seed in enumerate(seeds, start=1):
        run_id = f"task-gamble_run-{i}"
        fit = tmp_path / run_id / "fit.h5"
        fit.parent.mkdir(parents=True)
        _write_fit(fit, seed=seed, zero_b=i in zero_b_runs)
        out = _outputs(tmp_path / run_id / "contrast-a_vs_b", ("effect", "variance", "t", "z", "p"))
        contrast_job.run({"fit": str(fit)}, out, COMBINE_PARAMS, {**WILD, "run_id": run_id})
        fits.append(str(fit))
        effects.append(out["effect"])
        variances.append(out["variance"])
    return fits, effects, variances


def test_combine_job_matches_hand_inverse_variance_mean(tmp_path):
    fits, effects, variances = _run_maps(tmp_path, seeds=(3, 4, 5), zero_b_runs=(2,))
    out = _outputs(tmp_path / "combined", ("effect", "variance", "t", "z", "p"))
    combine_job.run({"fit": fits}, out, COMBINE_PARAMS, {"subject": "01", "contrast": "a_vs_b"})
    e = np.stack([_load(effects[i]).ravel() for i in (0, 2)])
    v = np.stack([_load(variances[i]).ravel() for i in (0, 2)])
    # reference: inverse-variance weighted mean by hand with numpy (Cochran 1954) of the run-level
    # maps the contrast step wrote (float32); NaN = run missing
    w = np.where(np.isfinite(v), 1 / v, 0.0)
    with np.errstate(invalid="ignore"):
        expected = np.nansum(w * np.nan_to_num(e), 0) / w.sum(0)
    got = _load(out["effect"]).ravel()
    have = w.sum(0) > 0
    np.testing.assert_allclose(got[have], expected[have], rtol=1e-5)
    assert np.isnan(got[~have]).all()
    side = json.loads((tmp_path / "combined" / "t.json").read_text())
    assert side["map"]["level"] == "subject" and side["map"]["run"] == "" and side["map"]["session"] == ""
    assert side["runs_used"] == ["task-gamble_run-1", "task-gamble_run-3"]
    assert side["runs_left_out"][0]["run"] == "task-gamble_run-2" and side["dof"] == 2 * 44
    assert [d["path"].endswith("fit.h5") for d in side["inputs"]["fit"]] == [True] * 3


def test_combine_job_all_skipped_writes_nan_maps_marked_skipped(tmp_path):
    """Issue 14.5: a contrast estimable in no run of a subject never stops the study."""
    fits, _, _ = _run_maps(tmp_path, seeds=(6, 7), zero_b_runs=(1, 2))
    out = _outputs(tmp_path / "combined", ("effect", "variance", "t", "z", "p"))
    combine_job.run({"fit": fits}, out, COMBINE_PARAMS, {"subject": "01", "contrast": "a_vs_b"})
    for key in out:
        assert np.isnan(_load(out[key])).all()
        side = json.loads(Path(out[key]).with_suffix("").with_suffix(".json").read_text())
        assert side["skipped"] is True and "excluded" not in side
        assert "not estimable" in side["reason"] and "task-gamble_run-2" in side["reason"]
        assert side["runs_used"] == [] and len(side["runs_left_out"]) == 2
    from glmsteps.jobs.index import index_rows
    assert set(index_rows(list(out.values()), tmp_path)["status"]) == {"skipped"}


def test_combine_job_every_run_excluded_writes_nan_maps_marked_excluded(tmp_path):
    """Issue 14.5: a subject whose every run was excluded upstream is recorded, not an error."""
    fits = []
    for i in (1, 2):
        fit = tmp_path / f"task-gamble_run-{i}" / "fit.h5"
        fit.parent.mkdir(parents=True)
        _write_fit(fit, seed=30 + i, excluded=True)
        fits.append(str(fit))
    for params, keys in ((COMBINE_PARAMS, ("effect", "variance", "t", "z", "p")),
                         (F_PARAMS, ("f", "z", "p"))):
        out = _outputs(tmp_path / f"combined-{params['name']}", keys)
        combine_job.run({"fit": fits}, out, params, {"subject": "01", "contrast": params["name"]})
        for key in keys:
            assert np.isnan(_load(out[key])).all()
            side = json.loads(Path(out[key]).with_suffix("").with_suffix(".json").read_text())
            assert side["excluded"] is True and side["reason"].startswith("all 2 run(s) excluded")
        from glmsteps.jobs.index import index_rows
        assert set(index_rows(list(out.values()), tmp_path)["status"]) == {"excluded"}


def test_combine_job_grid_mismatch_and_nonestimable_errors(tmp_path):
    fits, _, _ = _run_maps(tmp_path, seeds=(6, 7), zero_b_runs=(1, 2))
    out = _outputs(tmp_path / "combined", ("effect", "variance", "t", "z", "p"))
    # not estimable without skip_nonestimable: the run-level error, naming contrast and run
    with pytest.raises(ContrastError, match="a_vs_b.*task-gamble_run-1"):
        combine_job.run({"fit": fits}, out, {**COMBINE_PARAMS, "skip_nonestimable": False},
                        {"subject": "01", "contrast": "a_vs_b"})
    # a run on another grid (affine shifted by 2 mm)
    other = tmp_path / "other"
    other.mkdir()
    f2, _, _ = _run_maps(other, seeds=(8, 9))
    with h5py.File(f2[1], "r+") as h5:
        h5["grid/affine"][0, 3] += 2.0
    with pytest.raises(DataError) as info:
        combine_job.run({"fit": f2}, out, COMBINE_PARAMS, {"subject": "01", "contrast": "a_vs_b"})
    assert "\n" not in str(info.value) and "task-gamble_run-2" in str(info.value)
    assert not (tmp_path / "combined").exists()


# ---------------------------------------------------------------------------------------------
# threshold
# ---------------------------------------------------------------------------------------------

def _threshold_inputs(tmp_path, blob: bool = True):
    shape = (14, 12, 10)
    rng = np.random.default_rng(11)
    z = rng.normal(size=shape)
    if blob:
        z[3:7, 3:7, 3:6] = 6.0
        z[4, 5, 4] = 8.0
    z[0, :, :] = np.nan
    p = 2 * sps.norm.sf(np.abs(z))
    affine = np.diag([2.0, 2.0, 2.0, 1.0])
    affine[:3, 3] = [-10, -12, -8]
    for name, data in (("z", z), ("p", p), ("mean", rng.uniform(50, 100, size=shape))):
        save_nifti(tmp_path / f"{name}.nii.gz", data, affine)
    return z, p, affine


def test_threshold_job_outputs(tmp_path):
    z, p, affine = _threshold_inputs(tmp_path)
    folder = tmp_path / "threshold-fwe"
    outputs = {"thresholded": str(folder / "thresholded.nii.gz"), "mask": str(folder / "mask.nii.gz"),
               "clusters": str(folder / "clusters.tsv"), "figure": str(folder / "slices.png")}
    params = {"name": "fwe", "method": "bonferroni", "alpha": 0.05, "connectivity": 6}
    threshold_job.run({"z": str(tmp_path / "z.nii.gz"), "p": str(tmp_path / "p.nii.gz"),
                       "underlay": str(tmp_path / "mean.nii.gz")}, outputs, params, {"threshold": "fwe"})
    finite = np.isfinite(p)
    # reference: Dunn (1961) Bonferroni, alpha / number of finite voxels
    expected = finite & (np.nan_to_num(p, nan=1.0) <= 0.05 / finite.sum())
    mask = np.asarray(nib.load(outputs["mask"]).dataobj)
    assert mask.dtype == np.uint8
    np.testing.assert_array_equal(mask.astype(bool), expected)
    thr = _load(outputs["thresholded"])
    # one rule for float maps (issue 21): NaN outside the map, 0 where tested but not surviving
    np.testing.assert_array_equal(np.isnan(thr), np.isnan(z))
    np.testing.assert_allclose(thr[expected], z[expected].astype(np.float32))
    assert (thr[~expected & np.isfinite(z)] == 0).all()
    table = read_tsv(outputs["clusters"])
    assert table.loc[0, "peak_stat"] == pytest.approx(8.0)
    # reference: nibabel.affines.apply_affine of the peak voxel index
    np.testing.assert_allclose(table.loc[0, ["peak_x_mm", "peak_y_mm", "peak_z_mm"]].to_numpy(float),
                               nib.affines.apply_affine(affine, (4, 5, 4)))
    assert table.loc[0, "size_voxels"] >= 48 and table.loc[0, "volume_mm3"] == pytest.approx(table.loc[0, "size_voxels"] * 8)
    side = json.loads((folder / "thresholded.json").read_text())
    assert side["map"]["stat"] == "z_thresholded" and side["threshold"] == "fwe" and side["step"] == "threshold"
    # the written table is rounded: 0.1 mm, 3 significant digits for statistics (hand-checked format)
    header, *rows = (folder / "clusters.tsv").read_text().splitlines()
    columns = header.split("\t")
    for row in rows:
        for name, text in zip(columns, row.split("\t")):
            if text == "n/a":
                continue
            if name.endswith("_mm") or name.endswith("_mm3"):
                assert len(text.split(".")[1]) <= 1 if "." in text else True, (name, text)
            elif name.endswith("_stat"):
                assert len(text.replace("-", "").replace(".", "").lstrip("0").rstrip("0")) <= 3, (name, text)
    assert (folder / "slices.png").stat().st_size > 0 and (folder / "clusters.json").exists()


def test_threshold_job_empty_result_is_header_only(tmp_path):
    _threshold_inputs(tmp_path, blob=False)
    folder = tmp_path / "t"
    outputs = {"thresholded": str(folder / "thresholded.nii.gz"), "mask": str(folder / "mask.nii.gz"),
               "clusters": str(folder / "clusters.tsv"), "figure": str(folder / "slices.png")}
    threshold_job.run({"z": str(tmp_path / "z.nii.gz"), "p": str(tmp_path / "p.nii.gz"),
                       "underlay": str(tmp_path / "mean.nii.gz")}, outputs,
                      {"name": "q", "method": "fdr", "q": 0.01}, {"threshold": "q"})
    text = (folder / "clusters.tsv").read_text().splitlines()
    assert len(text) == 1 and text[0].startswith("cluster_id\tsize_voxels")
    side = json.loads((folder / "clusters.json").read_text())
    assert side["n_clusters"] == 0 and "no voxel survived" in side["note"]
    thr = _load(outputs["thresholded"])
    assert (thr[np.isfinite(thr)] == 0).all() and np.isfinite(thr).sum() > 0
