"""Run discovery from path patterns (BIDS entity conventions: sub-, ses-, task-, run-)."""

from __future__ import annotations

import pytest

from glmsteps.bids import RunKey, discover_runs, parse_run_id
from glmsteps.errors import ConfigError


def _touch(root, rel):
    path = root / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(b"")


def test_discovers_runs_with_and_without_sessions(tmp_path):
    pattern = "sub-{subject}/ses-{session}/func/sub-{subject}_ses-{session}_task-{task}_run-{run}_bold.nii.gz"
    for sub, ses, run in [("01", "a", "1"), ("01", "b", "1"), ("02", "a", "2")]:
        _touch(tmp_path, f"sub-{sub}/ses-{ses}/func/sub-{sub}_ses-{ses}_task-go_run-{run}_bold.nii.gz")
    _touch(tmp_path, "sub-03/ses-a/func/sub-04_ses-a_task-go_run-1_bold.nii.gz")  # subject mismatch: ignored
    _touch(tmp_path, "sub-01/ses-a/func/sub-01_ses-a_task-go_run-1_bold.json")
    runs = discover_runs(tmp_path, pattern)
    assert runs == [RunKey("01", "go", "1", "a"), RunKey("01", "go", "1", "b"), RunKey("02", "go", "2", "a")]
    assert runs[0].run_id == "ses-a_task-go_run-1"
    assert parse_run_id("01", runs[0].run_id) == runs[0]


def test_pattern_errors_are_one_line(tmp_path):
    with pytest.raises(ConfigError, match=r"lacks \['run'\]"):
        discover_runs(tmp_path, "sub-{subject}/sub-{subject}_task-{task}_bold.nii.gz")
    with pytest.raises(ConfigError, match="unknown placeholder"):
        discover_runs(tmp_path, "sub-{subject}/{acq}_task-{task}_run-{run}.nii.gz")
    with pytest.raises(ConfigError, match="does not exist"):
        discover_runs(tmp_path / "nope", "sub-{subject}_task-{task}_run-{run}.nii.gz")


def test_run_label_names_the_run_as_its_folder():
    # reference: BIDS entity labels sub-<label>, ses-<label>, task-<label>, run-<index> (BIDS specification 1.9,
    # "Entities", from memory); the run part equals the run folder name (RunKey.run_id)
    from glmsteps.bids import run_label
    key = RunKey("04", "beacon", "1")
    assert run_label({"subject": "04", "run_id": key.run_id}) == "sub-04 task-beacon_run-1"
    assert run_label({"subject": "04", "task": "beacon", "run": "1"}) == "sub-04 task-beacon_run-1"
    with_session = RunKey("01", "go", "2", "b")
    assert run_label({"subject": "01", "run_id": with_session.run_id}) == "sub-01 ses-b_task-go_run-2"
    assert run_label({"subject": "01", "session": "b", "task": "go", "run": "2", "contrast": "x"}) == \
        "sub-01 ses-b_task-go_run-2"
    assert run_label({}) == ""
