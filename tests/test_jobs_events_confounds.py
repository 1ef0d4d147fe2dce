"""Tests of the validate_events and select_confounds jobs on small files in tmp_path."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from types import SimpleNamespace

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from glmsteps.errors import ConfigError, ConfoundsError, DataError, EventsError
from glmsteps.fileio import read_tsv
from glmsteps.jobs import select_confounds as confounds_job
from glmsteps.jobs import validate_events as events_job
from glmsteps.jobs.common import run_script
from glmsteps.provenance import read_record

TR_S = 2.0
N_VOLUMES = 30
EVENTS_PARAMS = {"condition_column": "trial_type", "modulators": {"go": ["rt"], "stop": ["rt"]},
                 "repetition_time_s": TR_S, "duplicate_events": "error", "missing_duration": "impulse"}
CONFOUND_PARAMS = {"columns": ["trans_*", "rot_*"], "derivatives": True, "squares": True, "demean": True,
                   "scale": False, "censor": {"column": "framewise_displacement", "threshold": 0.5,
                                              "volumes_before": 1, "volumes_after": 2},
                   "drop_initial_volumes": 2, "max_censored_fraction": 0.5, "derivative_columns": []}
WILDCARDS = {"subject": "01", "task": "demo", "run": "1"}


def make_bold(path: Path, shape: tuple[int, ...] = (2, 2, 2, N_VOLUMES), tr_s: float = TR_S) -> Path:
    img = nib.Nifti1Image(np.zeros(shape, dtype=np.float32), np.eye(4))
    img.header.set_xyzt_units("mm", "sec")
    if len(shape) == 4:
        img.header.set_zooms((3.0, 3.0, 3.0, tr_s))
    nib.save(img, path)
    return path


def make_events(path: Path, rows: list[str] | None = None) -> Path:
    rows = rows or ["4\t2\tgo\t0.45", "10\t2\tstop\t0.61", "20\tn/a\tgo\t0.52", "40\t2\tgo\t0.38"]
    path.write_text("\n".join(["onset\tduration\ttrial_type\trt", *rows]) + "\n", encoding="utf-8")
    return path


def make_confounds(path: Path, fd: list[float] | None = None) -> Path:
    rng = np.random.default_rng(5)
    table = pd.DataFrame(rng.normal(0, 0.05, size=(N_VOLUMES, 6)),
                         columns=["trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z"])
    table["framewise_displacement"] = fd if fd is not None else [np.nan] + [0.1] * 9 + [0.8] + [0.1] * 19
    table["csf"] = rng.normal(size=N_VOLUMES)
    table.to_csv(path, sep="\t", index=False, na_rep="n/a")
    return path


def event_outputs(root: Path) -> dict[str, str]:
    return {"events": str(root / "out" / "events.tsv"), "summary": str(root / "out" / "events.json")}


def confound_outputs(root: Path) -> dict[str, str]:
    out = root / "out"
    return {"confounds": str(out / "confounds.tsv"), "summary": str(out / "confounds.json"),
            "figure": str(out / "confounds.png")}


def sha256(path: str | Path) -> str:
    # reference: hashlib sha256 of the file bytes, independent of glmsteps.provenance
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


# --------------------------------------------------------------------------- validate_events

def test_events_job_writes_clean_table_and_summary(tmp_path):
    inputs = {"events": str(make_events(tmp_path / "events_in.tsv")), "bold": str(make_bold(tmp_path / "bold.nii.gz"))}
    outputs = event_outputs(tmp_path)
    events_job.run(inputs, outputs, EVENTS_PARAMS, WILDCARDS)

    clean = read_tsv(outputs["events"])
    assert list(clean.columns) == ["onset", "duration", "condition", "rt"]
    np.testing.assert_array_equal(clean["duration"], [2.0, 2.0, 0.0, 2.0])
    summary = json.loads(Path(outputs["summary"]).read_text())
    assert summary["n_events"] == 4 and summary["scan_end_s"] == N_VOLUMES * TR_S
    assert summary["conditions"]["go"] == {"count": 3, "total_duration_s": 4.0}
    assert any("'duration' is n/a" in w for w in summary["warnings"])

    record = read_record(outputs["events"])  # events.tsv's sidecar is events.json
    assert record is not None and record == summary["provenance"]
    assert record["step"] == "validate_events" and record["params"] == EVENTS_PARAMS
    assert len(record["params_hash"]) == 64 and len(record["lineage_hash"]) == 64
    assert record["inputs"]["events"]["sha256"] == sha256(inputs["events"])
    assert record["inputs"]["bold"]["sha256"] == sha256(inputs["bold"])
    assert record["warnings"] == summary["warnings"]


def test_events_job_lineage_follows_params(tmp_path):
    inputs = {"events": str(make_events(tmp_path / "events_in.tsv")), "bold": str(make_bold(tmp_path / "bold.nii.gz"))}
    first, second, third = (event_outputs(tmp_path / name) for name in ("a", "b", "c"))
    events_job.run(inputs, first, EVENTS_PARAMS, WILDCARDS)
    events_job.run(inputs, second, EVENTS_PARAMS, WILDCARDS)
    events_job.run(inputs, third, {**EVENTS_PARAMS, "modulators": {}}, WILDCARDS)
    a, b, c = (read_record(o["events"]) for o in (first, second, third))
    assert a["lineage_hash"] == b["lineage_hash"]
    assert a["params_hash"] != c["params_hash"] and a["lineage_hash"] != c["lineage_hash"]


def test_events_job_header_tr_mismatch_is_an_error(tmp_path):
    # one TR policy: a configured TR is a check; a file stating another one (> 1 %) stops the run
    inputs = {"events": str(make_events(tmp_path / "events_in.tsv")),
              "bold": str(make_bold(tmp_path / "bold.nii.gz", tr_s=2.5))}
    with pytest.raises(DataError) as info:
        events_job.run(inputs, event_outputs(tmp_path), EVENTS_PARAMS, WILDCARDS)
    message = str(info.value)
    assert "\n" not in message and "bold.nii.gz" in message and "2.5 s" in message
    assert "acquisition.repetition_time_s" in message
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("bad", ["events", "bold", "params", "extra_param"])
def test_events_job_bad_input_writes_nothing(tmp_path, bad):
    events = make_events(tmp_path / "events_in.tsv",
                         ["4\t2\tgo\t0.4", "10\t-1\tgo\t0.5"] if bad == "events" else None)
    bold = make_bold(tmp_path / "bold.nii.gz", shape=(2, 2, 2) if bad == "bold" else (2, 2, 2, N_VOLUMES))
    params = {k: v for k, v in EVENTS_PARAMS.items() if not (bad == "params" and k == "modulators")}
    if bad == "extra_param":
        params["threads"] = 2  # not a setting of this step (DEVELOPERS.md: params hold exactly its settings)
    expected = {"events": EventsError, "bold": DataError, "params": ConfigError, "extra_param": ConfigError}[bad]
    with pytest.raises(expected) as info:
        events_job.run({"events": str(events), "bold": str(bold)}, event_outputs(tmp_path), params, WILDCARDS)
    assert "\n" not in str(info.value)
    if bad == "bold":
        assert "bold.nii.gz" in str(info.value) and "(2, 2, 2)" in str(info.value)
    assert not (tmp_path / "out").exists()


def test_run_script_turns_user_error_into_one_line(tmp_path):
    events = make_events(tmp_path / "events_in.tsv", ["4\t2\tgo\tfast"])
    log = tmp_path / "validate.log"
    smk = SimpleNamespace(input={"events": str(events), "bold": str(make_bold(tmp_path / "bold.nii.gz"))},
                          output=event_outputs(tmp_path), params=EVENTS_PARAMS, wildcards=WILDCARDS,
                          log=[str(log)], threads=1)
    with pytest.raises(SystemExit) as info:
        run_script(events_job.run, smk)
    assert info.value.code == 1
    lines = log.read_text().splitlines()
    assert len(lines) == 1 and "EventsError" in lines[0] and "'rt'" in lines[0] and "data row 1" in lines[0]
    assert not (tmp_path / "out").exists()


# --------------------------------------------------------------------------- select_confounds

def test_confounds_job_writes_table_summary_and_figure(tmp_path):
    inputs = {"confounds": str(make_confounds(tmp_path / "confounds_in.tsv")),
              "bold": str(make_bold(tmp_path / "bold.nii.gz"))}
    outputs = confound_outputs(tmp_path)
    confounds_job.run(inputs, outputs, CONFOUND_PARAMS, WILDCARDS)

    table = read_tsv(outputs["confounds"])
    assert len(table) == N_VOLUMES
    # 6 motion columns -> 24 (Friston et al. 1996), then one spike per censored volume
    # worked by hand: FD 0.8 at volume 10 with 1 before and 2 after -> volumes 9..12
    summary = json.loads(Path(outputs["summary"]).read_text())
    assert summary["censored_volumes"] == [9, 10, 11, 12]
    assert summary["censored_fraction"] == pytest.approx(4 / (N_VOLUMES - 2))
    assert summary["columns"] == list(table.columns) and len(table.columns) == 24 + 4
    assert summary["columns"][-4:] == ["spike_0009", "spike_0010", "spike_0011", "spike_0012"]
    assert summary["n_volumes"] == N_VOLUMES and summary["drop_initial_volumes"] == 2
    assert summary["excluded"] is False and summary["exclusion_reason"] == ""
    assert Path(outputs["figure"]).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # reference: PNG signature (RFC 2083)

    for key in ("confounds", "figure"):  # both sidecars are confounds.json
        record = read_record(outputs[key])
        assert record == summary["provenance"] and record["step"] == "select_confounds"
        assert len(record["params_hash"]) == 64 and len(record["lineage_hash"]) == 64
    assert summary["provenance"]["inputs"]["confounds"]["sha256"] == sha256(inputs["confounds"])
    assert summary["provenance"]["inputs"]["bold"]["sha256"] == sha256(inputs["bold"])


def test_confounds_job_records_exclusion(tmp_path):
    fd = [np.nan] + [0.9] * 20 + [0.1] * 9
    inputs = {"confounds": str(make_confounds(tmp_path / "confounds_in.tsv", fd=fd)),
              "bold": str(make_bold(tmp_path / "bold.nii.gz"))}
    outputs = confound_outputs(tmp_path)
    confounds_job.run(inputs, outputs, CONFOUND_PARAMS, WILDCARDS)
    summary = json.loads(Path(outputs["summary"]).read_text())
    assert summary["excluded"] is True and "max_censored_fraction" in summary["exclusion_reason"]
    assert any("run excluded" in w for w in summary["warnings"])
    assert all(Path(p).exists() for p in outputs.values())  # outputs still written (static DAG)


@pytest.mark.parametrize("bad", ["nan", "censor_column", "params"])
def test_confounds_job_bad_input_writes_nothing(tmp_path, bad):
    path = make_confounds(tmp_path / "confounds_in.tsv")
    params = dict(CONFOUND_PARAMS)
    if bad == "nan":
        table = read_tsv(path)
        table.loc[7, "rot_y"] = np.nan
        table.to_csv(path, sep="\t", index=False, na_rep="n/a")
    elif bad == "censor_column":
        params["censor"] = {**CONFOUND_PARAMS["censor"], "column": "fd"}
    else:
        params["censor"] = {"column": "framewise_displacement", "threshold": 0.5}
    expected = {"nan": ConfoundsError, "censor_column": ConfoundsError, "params": ConfigError}[bad]
    with pytest.raises(expected) as info:
        confounds_job.run({"confounds": str(path), "bold": str(make_bold(tmp_path / "bold.nii.gz"))},
                          confound_outputs(tmp_path), params, WILDCARDS)
    message = str(info.value)
    assert "\n" not in message
    if bad == "nan":
        assert "confounds_in.tsv" in message and "'rot_y'" in message and "data row 8" in message
    if bad == "censor_column":
        assert "'fd'" in message and "framewise_displacement" in message
    assert not (tmp_path / "out").exists()


def test_confounds_job_without_censoring(tmp_path):
    inputs = {"confounds": str(make_confounds(tmp_path / "confounds_in.tsv")),
              "bold": str(make_bold(tmp_path / "bold.nii.gz"))}
    outputs = confound_outputs(tmp_path)
    params = {**CONFOUND_PARAMS, "censor": None, "columns": ["csf"], "derivatives": False, "squares": False}
    confounds_job.run(inputs, outputs, params, WILDCARDS)
    summary = json.loads(Path(outputs["summary"]).read_text())
    assert summary["columns"] == ["csf"] and summary["censored_volumes"] == []
    assert summary["censored_fraction"] == 0.0


def test_confounds_row_count_mismatch_names_the_confounds_file(tmp_path):
    # the BOLD has one volume more than the table: caught here, naming the table (not at the fit)
    path = make_confounds(tmp_path / "confounds_in.tsv")
    bold = make_bold(tmp_path / "bold.nii.gz", shape=(2, 2, 2, N_VOLUMES + 1))
    with pytest.raises(ConfoundsError) as info:
        confounds_job.run({"confounds": str(path), "bold": str(bold)}, confound_outputs(tmp_path), CONFOUND_PARAMS,
                          WILDCARDS)
    message = str(info.value)
    assert "\n" not in message and message.startswith(str(path))
    assert f"{N_VOLUMES} data rows" in message and f"{N_VOLUMES + 1} volumes" in message
    assert not (tmp_path / "out").exists()


def test_confounds_figure_titles_scales_and_motion_summary(tmp_path, monkeypatch):
    from scipy import stats

    rng = np.random.default_rng(2)
    table = pd.DataFrame({"move_x_mm": rng.normal(0, 0.2, N_VOLUMES), "move_y_mm": rng.normal(0, 0.2, N_VOLUMES),
                          "turn_x_rad": rng.normal(0, 0.004, N_VOLUMES),
                          "white_matter_mean": rng.normal(900, 4, N_VOLUMES),
                          "framewise_displacement": [np.nan] + [0.1] * 9 + [0.8] + [0.1] * 19})
    path = tmp_path / "confounds_in.tsv"
    table.to_csv(path, sep="\t", index=False, na_rep="n/a")
    figures = []
    monkeypatch.setattr(confounds_job, "save_figure", lambda fig, out: figures.append(fig))
    params = {**CONFOUND_PARAMS, "columns": ["move_*", "turn_*", "white_matter_mean"], "squares": False}
    outputs = confound_outputs(tmp_path)
    confounds_job.run({"confounds": str(path), "bold": str(make_bold(tmp_path / "bold.nii.gz"))}, outputs, params,
                      {"subject": "04", "run_id": "task-beacon_run-1"})
    axes = figures[0].axes
    # the title reads like the design figure's: the run as named by its folder
    assert axes[0].get_title() == "sub-04 task-beacon_run-1"
    assert [ax.get_ylabel() for ax in axes] == ["motion (mm)", "motion (rad)", "other signals (z)",
                                               "framewise_displacement"]
    # motion in its own unit, unchanged; other signals z-scored over the kept volumes
    np.testing.assert_array_equal(axes[0].lines[0].get_ydata(), table["move_x_mm"].to_numpy())
    np.testing.assert_array_equal(axes[1].lines[0].get_ydata(), table["turn_x_rad"].to_numpy())
    kept = table["white_matter_mean"].to_numpy()[2:]
    # reference: scipy.stats.zscore with ddof=1 over the kept volumes (2 dropped)
    np.testing.assert_allclose(axes[2].lines[0].get_ydata()[2:], stats.zscore(kept, ddof=1), rtol=1e-12)

    motion = json.loads(Path(outputs["summary"]).read_text())["motion"]
    assert set(motion["columns"]) == {"move_x_mm", "move_y_mm", "turn_x_rad"}
    assert motion["columns"]["turn_x_rad"]["max_abs"] == pytest.approx(np.abs(table["turn_x_rad"][2:]).max())
    fd = table["framewise_displacement"].to_numpy()[2:]
    assert motion["censor"]["column"] == "framewise_displacement"
    assert motion["censor"]["mean"] == pytest.approx(fd.mean()) and motion["censor"]["max"] == 0.8
    assert motion["censor"]["n_above_threshold"] == 1
