"""The invented toy study: deterministic, BIDS-style, and simulated as documented."""

from __future__ import annotations

import hashlib
import json

import nibabel as nib
import numpy as np
import pandas as pd
from scipy import stats

from glmsteps.bids import discover_runs
from glmsteps.toystudy import AR_RHO, N_VOLUMES, REPETITION_TIME_S, response_kernel, write_toy_study


def _digest(root):
    return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def test_same_seed_same_bytes(tmp_path, toy_data):
    again = write_toy_study(tmp_path / "again")
    assert _digest(again) == _digest(toy_data)


def test_layout_and_tables(toy_data):
    runs = discover_runs(toy_data, "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_space-toy_desc-preproc_bold.nii.gz")
    assert len(runs) == 24 and {r.task for r in runs} == {"beacon"}
    participants = pd.read_csv(toy_data / "participants.tsv", sep="\t", na_values=["n/a"], keep_default_na=False)
    assert list(participants.columns) == ["participant_id", "site", "age", "group"]
    assert participants["site"].value_counts().to_dict() == {"north": 4, "east": 4, "south": 4}
    events = pd.read_csv(next(toy_data.glob("sub-01/func/*run-1_events.tsv")), sep="\t", keep_default_na=False)
    assert list(events.columns[:3]) == ["onset", "duration", "trial_type"]  # BIDS events columns
    assert "n/a" in set(events["response_time"])
    img = nib.load(next(toy_data.glob("sub-01/func/*run-1*_bold.nii.gz")))
    assert img.shape[3] == N_VOLUMES and abs(img.header.get_zooms()[3] - REPETITION_TIME_S) < 1e-6
    truth = json.loads((toy_data / "truth.json").read_text())
    assert {b["condition"] for b in truth["blobs"]} == {"tap", "flash", "horn"}


def test_response_kernel_is_the_double_gamma():
    """Kernel equals gamma(6) - gamma(16)/6 pdfs (reference: scipy.stats.gamma), unit integral."""
    dt = 0.1
    t = np.arange(0, 32, dt)
    ref = stats.gamma.pdf(t, 6) - stats.gamma.pdf(t, 16) / 6
    ref /= ref.sum() * dt
    np.testing.assert_allclose(response_kernel(dt), ref, rtol=1e-10, atol=1e-12)


def test_noise_far_from_blobs_is_ar1_with_the_stated_rho(toy_data):
    """Lag-1 autocorrelation of detrended null voxels is near AR_RHO (simulation check)."""
    img = nib.load(next(toy_data.glob("sub-02/func/*run-2*_bold.nii.gz")))
    data = np.asarray(img.dataobj, dtype=np.float64)[2:6, 2:6, 8:12].reshape(-1, N_VOLUMES)  # inside mask, far from blobs
    t = np.arange(N_VOLUMES)
    confounds = pd.read_csv(next(toy_data.glob("sub-02/func/*run-2*_timeseries.tsv")), sep="\t")
    spikes = np.flatnonzero(confounds["displacement_mm"].to_numpy() > 0.5)
    basis = np.column_stack([np.ones(N_VOLUMES), t, t**2, np.cos(2 * np.pi * t / 115), np.sin(2 * np.pi * t / 115)]
                            + [np.eye(N_VOLUMES)[v] for v in spikes])
    resid = data.T - basis @ np.linalg.lstsq(basis, data.T, rcond=None)[0]
    r1 = (resid[1:] * resid[:-1]).sum(0) / (resid**2).sum(0)
    # OLS residual lag-1 estimates are biased down by about (1 + 3 rho)/n (common practice, from memory)
    assert abs(np.median(r1) - AR_RHO) < 0.08


def test_every_bold_has_a_bids_sidecar_with_its_repetition_time(toy_data):
    """The toy BOLDs carry their TR as BIDS does: RepetitionTime (s) in the JSON sidecar, consistent with
    the header's pixdim[4] in seconds (reference: BIDS specification 1.9, "Magnetic Resonance Imaging";
    header read with nibabel)."""
    from glmsteps.volumes import bids_sidecar_of, read_bold_header, read_run_timing

    bolds = sorted(toy_data.glob("sub-*/func/*_bold.nii.gz"))
    assert len(bolds) == 24
    for bold in bolds:
        side = bids_sidecar_of(bold)
        meta = json.loads(side.read_text())
        img = nib.load(bold)
        assert meta["RepetitionTime"] == REPETITION_TIME_S
        assert img.header.get_xyzt_units()[1] == "sec"
        assert abs(float(img.header.get_zooms()[3]) - meta["RepetitionTime"]) < 1e-6
        timing = read_run_timing(read_bold_header(bold), side, None)
        assert (timing.repetition_time_s, timing.source) == (REPETITION_TIME_S, "sidecar")
