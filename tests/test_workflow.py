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
    """Far from every blob, run-level z is N(0, 1): mean within 0.1, SD within 0.15 of 1 (issue 2)."""
    xyz = world_grid()
    far = brain_mask().copy()
    for blob in BLOBS:
        far &= np.linalg.norm(xyz - np.asarray(blob.centre_mm), axis=-1) > blob.radius_mm + 15.0
    for contrast in ("tap", "flash", "horn"):
        values = np.concatenate([_z(toy_results, str(r.relative_to(toy_results.results)), contrast)[far]
                                 for r in sorted(toy_results.results.glob("sub-*/task-*_run-*"))])
        values = values[np.isfinite(values)]
        assert abs(values.mean()) < 0.1, (contrast, values.mean())
        assert abs(values.std() - 1.0) < 0.15, (contrast, values.std())


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
    At each blob centre and for each site, the subjects' combined effects are compared with the
    planted amplitude x each subject's amplitude_gain, divided by (1 + m/100) where m is the
    voxel's mean planted response in percent (percent scaling divides by the voxel's temporal
    mean, which includes that response). The pooled z = sum(effect - truth) / sqrt(sum(variance))
    over a site's 4 subjects is N(0, 1) if the estimates are unbiased and their variances right;
    |z| < 3.29 is its two-sided 0.1 % bound (9 checks: family-wise about 1 %). A 10 % error in the
    scaling of one site moves its z by about 0.1 x amplitude / SE, i.e. 4-10 here, so it fails.
    """
    from glmsteps.toystudy import BLOBS, blob_weights, predicted_response, toy_affine

    truth = json.loads((toy_data / "truth.json").read_text())
    gains = {s["participant_id"].removeprefix("sub-"): s["amplitude_gain"] for s in truth["subjects"]}
    sites = {s["participant_id"].removeprefix("sub-"): s["site"] for s in truth["subjects"]}
    assert max(truth["sites"][s]["gain"] for s in truth["sites"]) / \
        min(truth["sites"][s]["gain"] for s in truth["sites"]) == pytest.approx(1.6875)
    inverse = np.linalg.inv(toy_affine())
    weights = {b.condition: blob_weights(b) for b in BLOBS}
    for blob in truth["blobs"]:
        ijk = tuple(int(round(v)) for v in (inverse @ np.append(blob["centre_mm"], 1.0))[:3])
        by_site: dict[str, list[tuple[float, float, float]]] = {}
        for subject, site in sites.items():
            base = toy_results.results / f"sub-{subject}" / "combined" / f"contrast-{blob['condition']}"
            effect = float(np.asarray(nib.load(base / "effect.nii.gz").dataobj)[ijk])
            variance = float(np.asarray(nib.load(base / "variance.nii.gz").dataobj)[ijk])
            # mean planted response (percent) at this voxel, averaged over the subject's runs
            means = []
            for events_path in sorted(toy_data.glob(f"sub-{subject}/func/*_events.tsv")):
                events = pd.read_csv(events_path, sep="\t")
                means.append(sum(b.amplitude_percent * gains[subject] * weights[b.condition][ijk]
                                 * predicted_response(events, b.condition).mean() for b in BLOBS))
            expected = blob["amplitude_percent"] * gains[subject] / (1.0 + float(np.mean(means)) / 100.0)
            by_site.setdefault(site, []).append((effect, variance, expected))
        assert set(by_site) == set(truth["sites"])
        for site, rows in by_site.items():
            e, v, x = (np.array(col) for col in zip(*rows))
            z = (e - x).sum() / np.sqrt(v.sum())
            assert abs(z) < 3.29, (blob["condition"], site, e, x, z)
            # and in plain words: the site's mean effect is within 10 % of the planted amplitude
            assert abs(e.mean() / x.mean() - 1.0) < 0.10, (blob["condition"], site, e.mean(), x.mean())
