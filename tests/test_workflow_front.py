"""Workflow tests of the run-level front end: per-run TR at two sites, new design names, figure titles."""

from __future__ import annotations

import copy
import json

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from glmsteps.fileio import read_json
from workflow_helpers import Workspace, default_config, planned_jobs

pytestmark = [pytest.mark.workflow, pytest.mark.slow]

SITES = {"A": 2.0, "B": 0.8}  # subject -> TR (s)
DURATION_S = 96.0
GRID = (5, 5, 4)


def write_two_site_study(root):
    """Two subjects scanned 96 s at TR 2.0 s (48 volumes) and 0.8 s (120 volumes); TR only in the sidecars."""
    rng = np.random.default_rng(4)
    affine = np.diag([3.0, 3.0, 3.0, 1.0])
    rows = []
    for sub, tr in SITES.items():
        n = int(round(DURATION_S / tr))
        func, anat = root / f"sub-{sub}" / "func", root / f"sub-{sub}" / "anat"
        func.mkdir(parents=True)
        anat.mkdir(parents=True)
        img = nib.Nifti1Image((1000 + rng.normal(0, 10, GRID + (n,))).astype(np.float32), affine)
        nib.save(img, func / f"sub-{sub}_task-x_run-1_bold.nii.gz")  # nibabel's default header: no time unit
        (func / f"sub-{sub}_task-x_run-1_bold.json").write_text(json.dumps({"RepetitionTime": tr}))
        pd.DataFrame({"onset": [6.0, 40.0, 70.0], "duration": [10.0, 10.0, 10.0], "trial_type": "tap"}).to_csv(
            func / f"sub-{sub}_task-x_run-1_events.tsv", sep="\t", index=False)
        pd.DataFrame({"move_x_mm": rng.normal(0, 0.1, n)}).to_csv(
            func / f"sub-{sub}_task-x_run-1_confounds.tsv", sep="\t", index=False)
        nib.save(nib.Nifti1Image(np.ones(GRID, np.uint8), affine), anat / f"sub-{sub}_mask.nii.gz")
        rows.append({"participant_id": f"sub-{sub}", "site": sub})
    pd.DataFrame(rows).to_csv(root / "participants.tsv", sep="\t", index=False)


def test_two_sites_at_two_trs_with_one_config(tmp_path):
    data = tmp_path / "data"
    write_two_site_study(data)
    config = default_config()
    config["inputs"] = {"root": str(data), "bold": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_bold.nii.gz",
                        "events": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_events.tsv",
                        "confounds": "sub-{subject}/func/sub-{subject}_task-{task}_run-{run}_confounds.tsv",
                        "mask": "sub-{subject}/anat/sub-{subject}_mask.nii.gz"}
    config["acquisition"] = {"repetition_time_s": None}
    config["confounds"] = {"columns": ["move_*"]}
    config["contrasts"] = {"tap": {"weights": {"tap": 1}}}
    config["group_models"] = {}
    ws = Workspace(workdir=tmp_path / "work", data=data, config=config)
    ws.workdir.mkdir()
    ws.write_config()
    targets = [f"results/sub-{s}/task-x_run-1/design.json" for s in SITES]
    ws.snakemake("--cores", "2", *targets)
    for sub, tr in SITES.items():
        design = read_json(ws.workdir / f"results/sub-{sub}/task-x_run-1/design.json")
        n = int(round(DURATION_S / tr))
        # worked by hand: volume j is sampled mid-volume, (j + 0.5) x TR of its own run
        np.testing.assert_allclose(design["frame_times_s"], (np.arange(n) + 0.5) * tr, rtol=0, atol=1e-9)
        assert design["repetition_time_s"] == tr and design["acquisition"]["source"] == "sidecar"
    # the sidecar is an input of its run's chain: editing it reruns that run's events, design (and fit)
    side = data / "sub-B" / "func" / "sub-B_task-x_run-1_bold.json"
    side.write_text(json.dumps({"RepetitionTime": 0.8, "SliceTiming": [0.0, 0.2, 0.4, 0.6]}))
    plan = [(rule, wc) for rule, wc in planned_jobs(ws.snakemake("--dry-run", "--cores", "2", *targets).stdout)
            if rule != "all"]
    assert {rule for rule, _ in plan} == {"validate_events", "build_design"}
    assert {wc["subject"] for _, wc in plan} == {"B"}
    # one configured TR is a check: site B's sidecar now disagrees, a one-line error naming the sidecar
    checked = copy.deepcopy(config)
    checked["acquisition"] = {"repetition_time_s": 2.0}
    proc = ws.snakemake("--cores", "1", "--forceall", targets[1], config=checked, check=False)
    assert proc.returncode != 0
    lines = [line for line in (proc.stdout + proc.stderr).splitlines() if "DataError:" in line]
    assert lines and side.name in lines[0] and "0.8 s" in lines[0] and "acquisition.repetition_time_s" in lines[0]


def test_toy_design_carries_only_the_new_names_and_titles_read_as_runs(toy_results):
    run = toy_results.results / "sub-01" / "task-beacon_run-1"
    names = list(pd.read_csv(run / "design.tsv", sep="\t", nrows=0).columns)
    assert not [n for n in names if "__derivative" in n or "__dispersion" in n or n.startswith("drift_")]
    assert [n for n in names if n.startswith("slow_")] and names[-1] == "intercept"
    summary = read_json(run / "design.json")
    assert summary["repetition_time_s"] == 2.0 and summary["acquisition"]["source"] == "sidecar"
    confounds = read_json(run / "confounds.json")
    assert set(confounds["motion"]["columns"]) == {f"move_{a}_mm" for a in "xyz"} | {f"turn_{a}_rad" for a in "xyz"}
    assert confounds["motion"]["censor"]["column"] == "displacement_mm"


@pytest.mark.parametrize(("section", "edit", "words"), [
    ("design", {"hrf": "glover"}, ["design.hrf", "'glover'", "'glover_1999'"]),
    ("contrasts", {"tap_latency": {"weights": {"tap__derivative": 1}}}, ["tap__derivative", "'tap__latency'"]),
])
def test_an_old_name_stops_the_workflow_with_the_new_name(toy_results, section, edit, words):
    config = copy.deepcopy(toy_results.config)
    config[section].update(edit)
    proc = toy_results.snakemake("--dry-run", "--cores", "1", config=config, check=False)
    assert proc.returncode != 0
    lines = [line for line in (proc.stdout + proc.stderr).splitlines() if "ConfigError:" in line]
    assert len(lines) == 1 and all(w in lines[0] for w in words), proc.stderr[-2000:]
