"""Tests of the fit job: end to end on a tiny run, defaults, input checks, non-finite voxels, tissue maps,
excluded runs. (Chunk and thread invariance of the voxel fit: tests/test_fitting.py.)"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
import scipy.signal
import statsmodels.api as sm
from numpy.testing import assert_allclose

import yaml

from glmsteps import estimation as est
from glmsteps import provenance
from glmsteps.errors import ConfigError, DataError
from glmsteps.fitstore import read_fit
from glmsteps.jobs import fit as job

SHAPE = (6, 7, 5)
AFFINE = np.diag([3.0, 3.0, 3.0, 1.0])
N_VOL, FIRST = 62, 2
TR_S = 2.0


def toy_design(n: int) -> tuple[np.ndarray, list[str], list[str]]:
    t = np.arange(n)
    task = ((t // 8) % 2).astype(float)
    X = np.column_stack([task, np.cos(np.pi * (t + 0.5) / n), np.ones(n)])
    spike = np.zeros(n)
    spike[20] = 1.0
    X = np.column_stack([X, spike])
    return X, ["go", "drift_00", "intercept", "spike_22"], ["interest", "drift", "intercept", "spike"]


def make_run(root: Path, *, bold_shape: tuple | None = None, tr_s: float = TR_S, mask_shape: tuple = SHAPE,
             mask_fill: bool = True, excluded: bool = False, rho: float = 0.3, seed: int = 0,
             n_vol: int = N_VOL, tissue: np.ndarray | None = None) -> dict[str, str]:
    """Write a tiny run (BOLD, mask, design, summary) into ``root``; return the job inputs."""
    rng = np.random.default_rng(seed)
    X, names, roles = toy_design(n_vol - FIRST)
    noise = scipy.signal.lfilter([1.0], [1.0, -rho], rng.standard_normal(SHAPE + (n_vol,)), axis=-1)
    effect = rng.uniform(0, 30, SHAPE)[..., None]
    data = 800 + rng.uniform(0, 400, SHAPE)[..., None] + 12 * noise
    data[..., FIRST:] += effect * X[:, 0]
    data[0, 0, 0, 17] = np.nan            # non-finite voxel (one volume)
    data[1, 1, 1] = 640.0                 # constant voxel
    data = data.astype(np.float32)
    if bold_shape is not None:
        data = np.zeros(bold_shape, np.float32)
    img = nib.Nifti1Image(data, AFFINE)
    img.header.set_zooms((3.0, 3.0, 3.0, tr_s)[: data.ndim])
    nib.save(img, root / "bold.nii.gz")
    mask = np.zeros(mask_shape, np.uint8)
    if mask_fill:
        mask[...] = 1
        mask[-1] = 0
    nib.save(nib.Nifti1Image(mask, AFFINE), root / "mask.nii.gz")
    import pandas as pd

    pd.DataFrame(X, columns=names).to_csv(root / "design.tsv", sep="\t", index=False)
    (root / "design.json").write_text(json.dumps({
        "names": names, "roles": roles, "conditions": ["go", "", "", ""], "basis": ["main", "", "", ""],
        "first_volume": FIRST, "n_volumes": n_vol, "excluded": excluded, "repetition_time_s": TR_S}))
    inputs = {"bold": str(root / "bold.nii.gz"), "mask": str(root / "mask.nii.gz"),
              "design": str(root / "design.tsv"), "design_summary": str(root / "design.json")}
    if tissue is not None:
        nib.save(nib.Nifti1Image(tissue.astype(np.int16), AFFINE), root / "tissue.nii.gz")
        inputs["tissue"] = str(root / "tissue.nii.gz")
    return inputs


def outputs_in(folder: Path) -> dict[str, str]:
    return {"fit": str(folder / "fit.h5"), "mean": str(folder / "mean.nii.gz"),
            "residual_sd": str(folder / "residual_sd.nii.gz"), "ar_coef": str(folder / "ar_coef.nii.gz")}


PARAMS = {"scaling": "percent", "grand_mean_value": 100.0, "autocorrelation": "ar1", "ar_order": 1,
          "ar_smoothing_fwhm_mm": 6.0, "ar_bin_width": 0.01, "non_finite_voxels": "drop"}
WILDCARDS = {"subject": "01", "run_id": "task-go_run-1"}


def test_job_end_to_end(tmp_path: Path) -> None:
    inputs = make_run(tmp_path)
    out = tmp_path / "out"
    job.run(inputs, outputs_in(out), PARAMS, WILDCARDS)
    fit = read_fit(out / "fit.h5")
    counts = fit.attrs["status_counts"]
    in_mask = 5 * 7 * 5
    assert counts == {"outside_mask": 6 * 7 * 5 - in_mask, "non_finite": 1, "zero_variance": 1,
                      "nonpositive_mean": 0, "fitted": in_mask - 2}
    assert fit.beta.shape == (4, in_mask - 2) and fit.beta.dtype == np.float32
    assert fit.attrs["autocorrelation"] == "ar1" and fit.attrs["scaling"] == "percent"
    assert np.all(fit.dof == (N_VOL - FIRST) - 4)
    side = json.loads((out / "fit.json").read_text())
    assert side["voxel_counts"] == counts and side["n_bins"] == fit.bin_rho.size and side["dof"] == N_VOL - FIRST - 4
    assert side["autocorrelation"] == "ar1" and set(side["timing_s"]) >= {"read", "fit"}
    assert side["lineage_hash"] == fit.attrs["lineage_hash"]
    # voxels are fitted in the order the file stores them but stored in C order of the grid
    assert np.all(np.diff(fit.voxel_index) > 0)
    # the bold hash computed while streaming equals the one build_record would compute
    ref = provenance.build_record("fit", PARAMS, inputs, side["warnings"])
    assert side["inputs"] == ref["inputs"] and side["lineage_hash"] == ref["lineage_hash"]
    # QC maps: NaN outside the fitted voxels, residual SD is sqrt(residual variance)
    sd = np.asarray(nib.load(out / "residual_sd.nii.gz").dataobj)
    assert np.isnan(sd[-1]).all() and np.isnan(sd[0, 0, 0]) and np.isnan(sd[1, 1, 1])
    assert_allclose(sd.ravel()[fit.voxel_index], np.sqrt(fit.residual_variance), rtol=1e-6)
    ar = np.asarray(nib.load(out / "ar_coef.nii.gz").dataobj)
    assert_allclose(ar.ravel()[fit.voxel_index], fit.ar_coef[:, 0])
    mean_side = json.loads((out / "mean.json").read_text())
    assert mean_side["map"] == {"level": "run", "subject": "01", "session": None, "task": "go", "run": "1",
                                "contrast": None, "stat": "mean"}
    # the refit is the GLS of percent-scaled data at the voxel's bin coefficient
    data = nib.load(inputs["bold"]).get_fdata()[..., FIRST:].reshape(-1, N_VOL - FIRST)
    X, _, _ = toy_design(N_VOL - FIRST)
    n = X.shape[0]
    for k in (0, 40, fit.voxel_index.size - 1):
        y = data[fit.voxel_index[k]]
        y = 100 * y / y.mean()                                     # common practice: percent signal change
        r = fit.bin_rho[fit.bin[k]]
        gls = sm.GLS(y, X, sigma=r ** np.abs(np.subtract.outer(np.arange(n), np.arange(n)))).fit()
        assert_allclose(fit.beta[:3, k], gls.params[:3], rtol=1e-4, atol=1e-5)  # reference: statsmodels GLS
        c = fit.bin_covariance[fit.bin[k]]
        assert_allclose(fit.beta[0, k] / np.sqrt(fit.residual_variance[k] * c[0, 0]), gls.tvalues[0], rtol=1e-4)


def test_default_autocorrelation_model_is_the_gls_of_each_bins_ar_model(tmp_path: Path) -> None:
    inputs = make_run(tmp_path, rho=0.5)
    out = tmp_path / "out"
    job.run(inputs, outputs_in(out), {"non_finite_voxels": "drop"}, WILDCARDS)
    fit = read_fit(out / "fit.h5")
    side = json.loads((out / "fit.json").read_text())
    # 60 kept volumes, rank 4: 56 residual dof fit 5 AR coefficients (10 dof each), not the default 8
    assert fit.attrs["autocorrelation"] == "arp" and side["ar_order"] == 5 and fit.ar_coef.shape[1] == 5
    assert any("AR(8) does not fit" in w for w in side["warnings"])
    data = nib.load(inputs["bold"]).get_fdata()[..., FIRST:].reshape(-1, N_VOL - FIRST)
    X, _, _ = toy_design(N_VOL - FIRST)
    n = X.shape[0]
    for k in (0, 40, fit.voxel_index.size - 1):
        y = data[fit.voxel_index[k]]
        y = 100 * y / y.mean()                                     # common practice: percent signal change
        phi = fit.ar_coef[k].astype(np.float64)                    # the voxel's bin model
        sigma = est.autocorrelation_of_ar(phi, n)[np.abs(np.subtract.outer(np.arange(n), np.arange(n)))]
        gls = sm.GLS(y, X, sigma=sigma).fit()                      # reference: statsmodels GLS
        # the stored coefficients are float32: the GLS of those differs from the fit's in the 6th digit
        assert_allclose(fit.beta[:3, k], gls.params[:3], rtol=1e-4, atol=1e-4)
        c = fit.bin_covariance[fit.bin[k]]
        assert_allclose(fit.beta[0, k] / np.sqrt(fit.residual_variance[k] * c[0, 0]), gls.tvalues[0], rtol=1e-4)
        assert_allclose(fit.bin_rho[fit.bin[k]], est.autocorrelation_of_ar(phi, 2)[1], rtol=1e-5)


def test_missing_settings_take_the_schema_defaults(tmp_path: Path) -> None:
    # the defaults of every step are checked against config/schema.yaml in tests/test_settings_schema.py;
    # here: the job itself fills them in (ar1 with the default smoothing and bin width)
    inputs = make_run(tmp_path)
    out_a, out_b = tmp_path / "a", tmp_path / "b"
    job.run(inputs, outputs_in(out_a), PARAMS, WILDCARDS)
    job.run(inputs, outputs_in(out_b), {"autocorrelation": "ar1", "ar_order": 1, "ar_smoothing_fwhm_mm": 6.0,
                                         "non_finite_voxels": "drop"}, WILDCARDS)
    a, b = read_fit(outputs_in(out_a)["fit"]), read_fit(outputs_in(out_b)["fit"])
    assert np.array_equal(a.beta, b.beta) and np.array_equal(a.residual_variance, b.residual_variance)
    with pytest.raises(ConfigError, match="threads"):
        job.run(inputs, outputs_in(tmp_path / "c"), {**PARAMS, "threads": 2}, WILDCARDS)


def test_non_finite_voxel_is_a_one_line_error_by_default(tmp_path: Path) -> None:
    inputs = make_run(tmp_path)
    out = tmp_path / "out"
    params = {k: v for k, v in PARAMS.items() if k != "non_finite_voxels"}
    with pytest.raises(DataError) as info:
        job.run(inputs, outputs_in(out), params, WILDCARDS)
    message = str(info.value)
    assert "\n" not in message and inputs["bold"] in message
    assert "1 of 175 in-mask voxels" in message and "(0, 0, 0)" in message
    assert "fit.non_finite_voxels: drop" in message
    schema = yaml.safe_load((Path(__file__).parents[1] / "config" / "schema.yaml").read_text())
    assert "drop" in schema["properties"]["fit"]["properties"]["non_finite_voxels"]["enum"]
    assert not out.exists()
    with pytest.raises(ConfigError, match="non_finite_voxels"):
        job.run(inputs, outputs_in(out), {**PARAMS, "non_finite_voxels": "skip"}, WILDCARDS)


def test_dropped_non_finite_voxels_are_counted_and_logged(tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    inputs = make_run(tmp_path)
    out = tmp_path / "out"
    with caplog.at_level("INFO", logger="glmsteps"):
        job.run(inputs, outputs_in(out), PARAMS, WILDCARDS)
    side = json.loads((out / "fit.json").read_text())
    assert side["dropped_non_finite_voxels"] == 1 and side["voxel_counts"]["non_finite"] == 1
    assert any("dropped 1 of 175 in-mask voxels" in w for w in side["warnings"])
    assert "non_finite 1" in caplog.text
    assert 0 not in read_fit(out / "fit.h5").voxel_index   # voxel (0, 0, 0) is not fitted


def test_tissue_classes_never_share_a_bin(tmp_path: Path) -> None:
    tissue = np.zeros(SHAPE, dtype=np.int64)
    tissue[:, :4] = 1
    tissue[:, 4:] = 2
    tissue[2, 2, 2] = 0                   # an unlabelled voxel of the mask: a class of its own
    inputs = make_run(tmp_path, tissue=tissue)
    out = tmp_path / "out"
    job.run(inputs, outputs_in(out), PARAMS, WILDCARDS)
    fit = read_fit(out / "fit.h5")
    side = json.loads((out / "fit.json").read_text())
    assert side["n_tissue_classes"] == 3 and side["inputs"]["tissue"]["path"].endswith("tissue.nii.gz")
    labels = tissue.ravel()[fit.voxel_index]
    for b in np.unique(fit.bin):
        assert np.unique(labels[fit.bin == b]).size == 1
    # the same run without the map: the voxel fits differ (smoothing and bins were split)
    job.run({k: v for k, v in inputs.items() if k != "tissue"}, outputs_in(tmp_path / "plain"), PARAMS, WILDCARDS)
    assert not np.array_equal(read_fit(tmp_path / "plain" / "fit.h5").ar_coef, fit.ar_coef)


@pytest.mark.parametrize("value, pattern", [(0.5, r"whole-number label"), (-1.0, r"whole-number label"),
                                            (None, r"tissue map grid \(6, 7, 4\) differs")])
def test_bad_tissue_map_fails_up_front(tmp_path: Path, value: float | None, pattern: str) -> None:
    tissue = np.ones(SHAPE) if value is not None else np.ones((6, 7, 4))
    if value is not None:
        tissue[1, 2, 3] = value
    inputs = make_run(tmp_path)
    nib.save(nib.Nifti1Image(tissue.astype(np.float32), AFFINE), tmp_path / "tissue.nii.gz")
    out = tmp_path / "out"
    with pytest.raises(DataError, match=pattern) as info:
        job.run({**inputs, "tissue": str(tmp_path / "tissue.nii.gz")}, outputs_in(out), PARAMS, WILDCARDS)
    assert "\n" not in str(info.value) and str(tmp_path / "tissue.nii.gz") in str(info.value)
    assert not out.exists()


def test_ols_job_matches_statsmodels(tmp_path: Path) -> None:
    inputs = make_run(tmp_path)
    out = tmp_path / "out"
    job.run(inputs, outputs_in(out), {**PARAMS, "autocorrelation": "ols", "scaling": "grand_mean",
                                      "grand_mean_value": 1000.0}, WILDCARDS)
    fit = read_fit(out / "fit.h5")
    data = nib.load(inputs["bold"]).get_fdata()[..., FIRST:].reshape(-1, N_VOL - FIRST)
    fitted = data[fit.voxel_index]
    scale = 1000.0 / fitted.mean()                                  # common practice: grand-mean scaling
    X, _, _ = toy_design(N_VOL - FIRST)
    for k in (3, 77):
        ref = sm.OLS(fitted[k] * scale, X).fit()                     # reference: statsmodels OLS
        assert_allclose(fit.beta[:, k], ref.params, rtol=1e-5)
        assert_allclose(fit.residual_variance[k], ref.scale, rtol=1e-5)
    assert np.all(fit.ar_coef == 0) and fit.bin_rho.tolist() == [0.0]


def test_job_threads_do_not_change_the_fit(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # several chunks, fitted by a pool of 2 threads with the BOLD read by a reader thread
    monkeypatch.setenv("GLMSTEPS_CHUNK_VOXELS", "16")
    inputs = make_run(tmp_path)
    job.run(inputs, outputs_in(tmp_path / "a"), PARAMS, WILDCARDS, threads=1)
    job.run(inputs, outputs_in(tmp_path / "b"), PARAMS, WILDCARDS, threads=2)
    a, b = read_fit(tmp_path / "a" / "fit.h5"), read_fit(tmp_path / "b" / "fit.h5")
    for name in ("beta", "residual_variance", "ar_coef", "bin", "bin_covariance", "voxel_index"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    assert a.attrs["lineage_hash"] == b.attrs["lineage_hash"]


def test_chunk_size_from_environment(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("GLMSTEPS_CHUNK_VOXELS", raising=False)
    # the default is shared by the job's threads, at least 1024 voxels each
    assert [job.chunk_voxels(t) for t in (1, 2, 3, 8)] == [4096, 2048, 1365, 1024]
    inputs = make_run(tmp_path)
    job.run(inputs, outputs_in(tmp_path / "a"), PARAMS, WILDCARDS)
    monkeypatch.setenv("GLMSTEPS_CHUNK_VOXELS", "7")
    assert job.chunk_voxels() == job.chunk_voxels(threads=2) == 7
    job.run(inputs, outputs_in(tmp_path / "b"), PARAMS, WILDCARDS)
    a, b = read_fit(tmp_path / "a" / "fit.h5"), read_fit(tmp_path / "b" / "fit.h5")
    assert np.array_equal(a.beta, b.beta) and np.array_equal(a.residual_variance, b.residual_variance)
    assert a.attrs["lineage_hash"] == b.attrs["lineage_hash"]


def test_arp_order_follows_the_design(tmp_path: Path) -> None:
    inputs = make_run(tmp_path)
    out = tmp_path / "out"
    job.run(inputs, outputs_in(out), {**PARAMS, "autocorrelation": "arp", "ar_order": 4}, WILDCARDS)
    side = json.loads((out / "fit.json").read_text())
    # 60 kept volumes, rank 4: 56 residual dof fit 4 coefficients (10 dof each)
    assert side["ar_order"] == 4 and read_fit(out / "fit.h5").ar_coef.shape[1] == 4
    assert not any("does not fit" in w for w in side["warnings"])
    short = tmp_path / "short"
    short.mkdir()
    inputs = make_run(short, n_vol=36)  # 34 kept volumes, 30 residual dof: AR(3) at most
    job.run(inputs, outputs_in(short / "out"), {**PARAMS, "autocorrelation": "arp", "ar_order": 4}, WILDCARDS)
    side = json.loads((short / "out" / "fit.json").read_text())
    assert side["ar_order"] == 3 and read_fit(short / "out" / "fit.h5").ar_coef.shape[1] == 3
    assert sum("AR(4) does not fit" in w for w in side["warnings"]) == 1


def test_excluded_run(tmp_path: Path) -> None:
    inputs = make_run(tmp_path, excluded=True)
    out = tmp_path / "out"
    job.run(inputs, outputs_in(out), PARAMS, WILDCARDS)
    fit = read_fit(out / "fit.h5")
    assert fit.excluded and fit.beta.shape == (4, 0)
    for name in ("mean", "residual_sd", "ar_coef"):
        assert np.isnan(np.asarray(nib.load(out / f"{name}.nii.gz").dataobj)).all()
        assert json.loads((out / f"{name}.json").read_text())["excluded"] is True
    assert json.loads((out / "fit.json").read_text())["excluded"] is True


@pytest.mark.parametrize("case, pattern", [
    ("3d", r"must be 4D .* found shape \(6, 7, 5\)"),
    ("volumes", r"61 volumes but the design summary .* says 62"),
    ("grid", r"mask grid \(6, 7, 4\) differs from BOLD grid \(6, 7, 5\)"),
    ("empty", r"mask is empty"),
])
def test_bad_inputs_fail_up_front(tmp_path: Path, case: str, pattern: str) -> None:
    kwargs = {"3d": {"bold_shape": SHAPE}, "volumes": {"bold_shape": SHAPE + (N_VOL - 1,)},
              "grid": {"mask_shape": (6, 7, 4)}, "empty": {"mask_fill": False}}[case]
    inputs = make_run(tmp_path, **kwargs)
    out = tmp_path / "out"
    with pytest.raises(DataError, match=pattern) as info:
        job.run(inputs, outputs_in(out), PARAMS, WILDCARDS)
    message = str(info.value)
    assert "\n" not in message
    named = {"3d": "bold", "volumes": "bold", "grid": "mask", "empty": "mask"}[case]
    assert inputs[named] in message
    assert not out.exists()


def test_the_fit_keeps_the_runs_own_tr_from_the_design_summary(tmp_path: Path) -> None:
    """Issue 14.7: one TR rule (glmsteps.acquisition, applied by validate_events); the fit stores that TR."""
    inputs = make_run(tmp_path)
    summary = json.loads(Path(inputs["design_summary"]).read_text())
    summary["repetition_time_s"] = 0.8
    Path(inputs["design_summary"]).write_text(json.dumps(summary))
    job.run(inputs, outputs_in(tmp_path / "out"), PARAMS, WILDCARDS)
    assert read_fit(tmp_path / "out" / "fit.h5").attrs["repetition_time_s"] == pytest.approx(0.8)
    del summary["repetition_time_s"]
    Path(inputs["design_summary"]).write_text(json.dumps(summary))
    with pytest.raises(DataError, match="repetition_time_s"):
        job.run(inputs, outputs_in(tmp_path / "again"), PARAMS, WILDCARDS)


def test_default_ar_smoothing_is_twice_the_voxel_size(tmp_path: Path) -> None:
    """fit.ar_smoothing_fwhm_mm: null (the schema's default) = 2 x the geometric mean voxel side."""
    inputs = make_run(tmp_path)              # 3 mm voxels (the test grid's affine)
    params = {k: v for k, v in PARAMS.items() if k != "ar_smoothing_fwhm_mm"}
    job.run(inputs, outputs_in(tmp_path / "out"), params, WILDCARDS)
    side = json.loads((tmp_path / "out" / "fit.json").read_text())
    assert side["ar_smoothing_fwhm_mm_used"] == pytest.approx(6.0)
    # reference: 2 x (2 * 3 * 4.5) ** (1/3) mm for an anisotropic 2 x 3 x 4.5 mm voxel, by hand
    assert est.default_smoothing_fwhm_mm([2.0, 3.0, 4.5]) == pytest.approx(2 * 27.0 ** (1 / 3))
