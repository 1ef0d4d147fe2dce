"""End-to-end: the workflow on the invented toy study (run once per session)."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from glmsteps.fileio import read_json
from glmsteps.provenance import hash_params, sidecar_path
from glmsteps.toystudy import BLOBS, brain_mask, world_grid
from workflow_helpers import make_workspace

pytestmark = [pytest.mark.workflow, pytest.mark.slow]


def _z(ws, run_dir: str, contrast: str) -> np.ndarray:
    return np.asarray(nib.load(ws.results / run_dir / f"contrast-{contrast}" / "z.nii.gz").dataobj, dtype=float)


def test_planted_blobs_are_recovered_at_run_level(toy_results):
    """Each condition's blob peaks above z = 5 in every run (truth.json is the reference)."""
    xyz = world_grid()
    runs = sorted(p.relative_to(toy_results.results) for p in toy_results.results.glob("sub-*/task-*_run-*"))
    assert len(runs) == 24
    for blob in BLOBS:
        near = np.linalg.norm(xyz - np.asarray(blob.centre_mm), axis=-1) <= blob.radius_mm
        peaks = [np.nanmax(_z(toy_results, str(r), blob.condition)[near]) for r in runs]
        assert min(peaks) > 5.0, (blob.condition, peaks)


def test_null_voxels_have_standard_normal_z(toy_results):
    """Far from every blob, run-level z is N(0, 1), within the sampling error of the pooled voxels.

    About 73,000 null z values per contrast (24 runs x ~3,000 voxels, independent noise across
    voxels): the SE of their mean is 1/sqrt(N) ~ 0.0037 and of their SD 1/sqrt(2N) ~ 0.0026, so
    a 4-SE bound (mean within 0.015, SD within 0.011 of 1) catches a 2 % miscalibration of the
    variance; the count beyond |z| = 3.29 (p < 0.001) must lie in its binomial 99.9 % interval
    (reference: scipy.stats.binom), i.e. below about 1.4x nominal. With the AR smoothing at 5 mm on
    these 4 mm voxels the SD was 1.020 and the count 1.8x nominal, which these bounds reject.
    """
    from scipy import stats as sps

    xyz = world_grid()
    far = brain_mask().copy()
    for blob in BLOBS:
        far &= np.linalg.norm(xyz - np.asarray(blob.centre_mm), axis=-1) > blob.radius_mm + 15.0
    for contrast in ("tap", "flash", "horn"):
        values = np.concatenate([_z(toy_results, str(r.relative_to(toy_results.results)), contrast)[far]
                                 for r in sorted(toy_results.results.glob("sub-*/task-*_run-*"))])
        values = values[np.isfinite(values)]
        n = values.size
        assert n > 60_000
        assert abs(values.mean()) < 4 / np.sqrt(n), (contrast, values.mean())
        assert abs(values.std() - 1.0) < 4 / np.sqrt(2 * n), (contrast, values.std())
        lo, hi = sps.binom.interval(0.999, n, 0.001)
        assert lo <= np.sum(np.abs(values) > 3.2905) <= hi, (contrast, np.mean(np.abs(values) > 3.2905))


def test_maps_share_the_bold_grid_and_are_nan_outside_the_mask(toy_results, toy_data):
    bold = nib.load(next(toy_data.glob("sub-01/func/*run-1*_bold.nii.gz")))
    z = nib.load(toy_results.results / "sub-01" / "task-beacon_run-1" / "contrast-tap" / "z.nii.gz")
    np.testing.assert_allclose(z.affine, bold.affine)
    assert z.shape == bold.shape[:3]
    data = np.asarray(z.dataobj)
    assert np.all(np.isnan(data[~brain_mask()]))
    assert z.get_data_dtype() == np.float32


def test_index_lists_every_map_with_hashes(toy_results):
    index = pd.read_csv(toy_results.results / "index.tsv", sep="\t", keep_default_na=False, dtype=str)
    assert list(index.columns[:8]) == ["level", "subject", "session", "task", "run", "contrast", "stat", "path"]
    assert {"params_hash", "lineage_hash"} <= set(index.columns)
    assert set(index["level"]) >= {"run", "subject", "group"}
    for path in index["path"]:
        assert (toy_results.results / path).exists(), path
    runs = index[index["level"] == "run"]
    # 24 runs x (4 t contrasts x 5 maps + 1 F contrast x 3 maps)
    assert len(runs) == 24 * (4 * 5 + 3)
    assert (index["lineage_hash"].str.len() == 64).all()


def test_sidecars_record_params_and_their_hash(toy_results):
    """params_hash is the sha256 of the canonical JSON of the recorded params (reference: hashlib)."""
    for path in [toy_results.results / "sub-01" / "task-beacon_run-1" / "contrast-tap" / "z.nii.gz",
                 toy_results.results / "sub-01" / "task-beacon_run-1" / "fit.h5",
                 toy_results.results / "sub-01" / "task-beacon_run-1" / "design.tsv"]:
        record = read_json(sidecar_path(path))
        record = record.get("provenance", record)
        assert record["params_hash"] == hash_params(record["params"])
        assert record["glmsteps_version"]
        assert record["inputs"]


def test_design_figure_per_run(toy_results):
    for run_dir in toy_results.results.glob("sub-*/task-*_run-*"):
        png = run_dir / "design.png"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


# ---------------------------------------------------------------- bad inputs
@pytest.fixture()
def one_run(tmp_path, toy_data):
    """A copy of one subject's first run only, for error tests."""
    data = tmp_path / "data"
    (data / "sub-01" / "func").mkdir(parents=True)
    shutil.copytree(toy_data / "sub-01" / "anat", data / "sub-01" / "anat")
    shutil.copy(toy_data / "participants.tsv", data / "participants.tsv")
    for f in (toy_data / "sub-01" / "func").glob("*run-1*"):
        shutil.copy(f, data / "sub-01" / "func" / f.name)
    return make_workspace(tmp_path / "work", data)


def _one_error_line(proc) -> str:
    lines = (proc.stderr + proc.stdout).splitlines()
    mine = [line for line in lines if any(k in line for k in ("EventsError:", "ContrastError:", "DataError:", "ConfigError:"))]
    assert mine, proc.stderr[-3000:]
    return mine[0]


def test_events_without_onset_is_a_one_line_error(one_run):
    events = next((one_run.data / "sub-01" / "func").glob("*_events.tsv"))
    table = pd.read_csv(events, sep="\t")
    table.drop(columns="onset").to_csv(events, sep="\t", index=False)
    target = "results/sub-01/task-beacon_run-1/events.tsv"
    proc = one_run.snakemake("--cores", "1", target, check=False)
    assert proc.returncode != 0
    line = _one_error_line(proc)
    assert events.name in line and "onset" in line
    assert not (one_run.workdir / target).exists()


def test_unknown_condition_in_a_contrast_is_a_one_line_error(one_run):
    one_run.config["contrasts"] = {"typo": {"weights": {"tapp": 1}}}
    one_run.config["group_models"] = {}
    one_run.write_config()
    target = "results/sub-01/task-beacon_run-1/contrast-typo/z.nii.gz"
    proc = one_run.snakemake("--cores", "1", target, check=False)
    assert proc.returncode != 0
    line = _one_error_line(proc)
    assert "typo" in line and "tapp" in line
    assert not (one_run.workdir / target).exists()


def test_config_outside_the_schema_is_a_one_line_error(one_run):
    one_run.config["fit"]["threads"] = 0
    one_run.write_config()
    proc = one_run.snakemake("--cores", "1", "--dry-run", check=False)
    assert proc.returncode != 0
    line = _one_error_line(proc)
    assert "fit.threads" in line and "minimum" in line
    assert "Failed validating" not in proc.stderr + proc.stdout  # no schema dump after the line


def test_3d_bold_is_a_one_line_error(one_run):
    bold_path = next((one_run.data / "sub-01" / "func").glob("*_bold.nii.gz"))
    img = nib.load(bold_path)
    nib.save(nib.Nifti1Image(np.asarray(img.dataobj)[..., 0], img.affine), bold_path)
    target = "results/sub-01/task-beacon_run-1/fit.h5"
    proc = one_run.snakemake("--cores", "1", target, check=False)
    assert proc.returncode != 0
    line = _one_error_line(proc)
    assert bold_path.name in line and ("4D" in line or "4-D" in line)
    assert not (one_run.workdir / target).exists()


def test_group_maps_recover_the_blobs_with_fwe_control(toy_results):
    """Group one-sample maps: FWE p < 0.05 at each blob centre, nothing FWE-significant far away (issue 6)."""
    xyz = world_grid()
    far = brain_mask().copy()
    for blob in BLOBS:
        far &= np.linalg.norm(xyz - np.asarray(blob.centre_mm), axis=-1) > blob.radius_mm + 10.0
    for blob in BLOBS:
        base = toy_results.results / "group" / "model-everyone" / f"contrast-{blob.condition}" / "mean"
        p_fwe = np.asarray(nib.load(base / "p_fwe.nii.gz").dataobj, dtype=float)
        centre = np.unravel_index(np.argmin(np.linalg.norm(xyz - np.asarray(blob.centre_mm), axis=-1)), xyz.shape[:3])
        assert p_fwe[centre] < 0.05, (blob.condition, p_fwe[centre])
        assert np.nanmin(p_fwe[far]) >= 0.05, blob.condition
        # the permutation p is never below 1 / n_permutations (Nichols & Holmes 2002)
        assert np.nanmin(p_fwe) >= 1.0 / toy_results.config["group_models"]["everyone"]["permutation"]["n_permutations"] - 1e-12


def test_planted_amplitudes_are_recovered_in_percent_signal_change_at_every_site(toy_results, toy_data):
    """truth.json's amplitudes come back, in percent signal change, at each site alike.

    The sites' scanners differ in gain by up to 1.7x (east 1.35 / south 0.80), so in raw units
    their effects differ by that much; percent scaling must remove it (README, fit.scaling).
    For each blob and site, the subjects' combined effects at every voxel inside the blob (where
    the planted response has its full amplitude) are compared with the planted amplitude x the
    subject's amplitude_gain, divided by (1 + m/100), m being the voxel's mean planted response in
    percent (percent scaling divides by the voxel's temporal mean, which includes it). The toy's
    noise is independent across voxels, so z = sum(effect - truth) / sqrt(sum(variance)) over a
    site's 4 subjects x 50-70 voxels is N(0, 1) if the estimates are unbiased and their variances
    right; |z| < 3.29 is its two-sided 0.1 % bound (9 checks: family-wise about 1 %). The site
    mean's standard error is about 0.9 % of the amplitude (measured), so a 5 % scaling error of
    one site moves its z by about 5 and fails.
    """
    from glmsteps.toystudy import blob_weights, predicted_response

    truth = json.loads((toy_data / "truth.json").read_text())
    gains = {s["participant_id"].removeprefix("sub-"): s["amplitude_gain"] for s in truth["subjects"]}
    sites = {s["participant_id"].removeprefix("sub-"): s["site"] for s in truth["subjects"]}
    site_gains = [truth["sites"][s]["gain"] for s in truth["sites"]]
    assert max(site_gains) / min(site_gains) == pytest.approx(1.6875)
    xyz = world_grid()
    weights = {b.condition: blob_weights(b) for b in BLOBS}
    events = {s: [pd.read_csv(f, sep="\t") for f in sorted(toy_data.glob(f"sub-{s}/func/*_events.tsv"))]
              for s in sites}
    for blob in BLOBS:
        inside = (np.linalg.norm(xyz - np.asarray(blob.centre_mm), axis=-1) <= blob.radius_mm) & brain_mask()
        assert inside.sum() >= 50
        for site in truth["sites"]:
            effects, variances, expected = [], [], []
            for subject in (s for s in sites if sites[s] == site):
                base = toy_results.results / f"sub-{subject}" / "combined" / f"contrast-{blob.condition}"
                effects.append(np.asarray(nib.load(base / "effect.nii.gz").dataobj, dtype=float)[inside])
                variances.append(np.asarray(nib.load(base / "variance.nii.gz").dataobj, dtype=float)[inside])
                # mean planted response (percent) at each voxel, averaged over the subject's runs
                m = np.mean([sum(b.amplitude_percent * gains[subject] * weights[b.condition][inside]
                                 * predicted_response(ev, b.condition).mean() for b in BLOBS)
                             for ev in events[subject]], axis=0)
                expected.append(blob.amplitude_percent * gains[subject] / (1.0 + m / 100.0))
            e, v, x = (np.concatenate(a) for a in (effects, variances, expected))
            z = (e - x).sum() / np.sqrt(v.sum())
            assert abs(z) < 3.29, (blob.condition, site, e.mean() / x.mean(), z)
