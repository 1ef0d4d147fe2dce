"""The one TR rule (glmsteps.acquisition), reading it from files (glmsteps.volumes), and a two-site study.

References: BIDS specification 1.9, "Magnetic Resonance Imaging": RepetitionTime and SliceTiming in
seconds in the BOLD's JSON sidecar (from memory); NIfTI-1 pixdim[4] with its time unit in xyzt_units,
written here with nibabel's own setters (an implementation outside glmsteps).
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from glmsteps.acquisition import check_slice_timing, choose_repetition_time
from glmsteps.errors import ConfigError, DataError, GlmstepsWarning
from glmsteps.jobs import select_confounds as confounds_job
from glmsteps.jobs import build_design as design_job
from glmsteps.jobs import validate_events as events_job
from glmsteps.volumes import (bids_sidecar_of, header_repetition_time_s, header_time_unit_known, read_bold_header,
                              read_run_timing)

BOLD = "sub-01_task-x_run-1_bold.nii.gz"
SIDE = "sub-01_task-x_run-1_bold.json"


def rule(**kwargs):
    kwargs.setdefault("bold_path", BOLD)
    kwargs.setdefault("sidecar_path", SIDE)
    kwargs.setdefault("sidecar_tr_s", None)
    kwargs.setdefault("header_tr_s", None)
    kwargs.setdefault("configured_tr_s", None)
    return choose_repetition_time(**kwargs)


# --------------------------------------------------------------------------- the rule

def test_per_run_tr_from_the_files_when_none_is_configured():
    t = rule(sidecar_tr_s=0.8, header_tr_s=0.8)
    assert (t.repetition_time_s, t.source, t.source_file) == (0.8, "sidecar", SIDE)
    t = rule(sidecar_path=None, header_tr_s=2.0)
    assert (t.repetition_time_s, t.source, t.source_file) == (2.0, "header", BOLD)
    assert t.configured_repetition_time_s is None


def test_no_tr_anywhere_is_a_one_line_error_naming_the_fix():
    for side in (SIDE, None):
        with pytest.raises(DataError) as info:
            rule(sidecar_path=side)
        message = str(info.value)
        assert "\n" not in message and BOLD in message and "acquisition.repetition_time_s" in message
        assert "RepetitionTime" in message


def test_configured_tr_is_a_check_within_one_percent():
    # within 1 %: the files' value is used (the number is a check)
    t = rule(sidecar_tr_s=2.015, configured_tr_s=2.0)
    assert (t.repetition_time_s, t.source, t.configured_repetition_time_s) == (2.015, "sidecar", 2.0)
    for kwargs, named in (({"sidecar_tr_s": 0.8}, SIDE), ({"sidecar_path": None, "header_tr_s": 2.5}, BOLD)):
        with pytest.raises(DataError) as info:
            rule(configured_tr_s=2.0, **kwargs)
        message = str(info.value)
        assert "\n" not in message and message.startswith(named) and "more than 1 %" in message
        assert "acquisition.repetition_time_s to null" in message


def test_configured_tr_fills_in_for_runs_whose_files_state_none():
    t = rule(configured_tr_s=1.5)
    assert (t.repetition_time_s, t.source, t.source_file) == (1.5, "config", "")


def test_sidecar_wins_over_a_disagreeing_header_with_a_warning():
    with pytest.warns(GlmstepsWarning, match=r"header TR \(pixdim\[4\]\) 1 s differs from RepetitionTime 0.8 s"):
        t = rule(sidecar_tr_s=0.8, header_tr_s=1.0)
    assert t.repetition_time_s == 0.8 and t.source == "sidecar"
    with warnings.catch_warnings():
        warnings.simplefilter("error", GlmstepsWarning)
        rule(sidecar_tr_s=0.8, header_tr_s=0.805)  # within 1 %: no warning


@pytest.mark.parametrize("value", [0, -1.0, float("nan"), "2", True])
def test_bad_configured_tr_is_a_config_error(value):
    with pytest.raises(ConfigError, match="acquisition.repetition_time_s"):
        rule(sidecar_tr_s=2.0, configured_tr_s=value)


def test_slice_timing_is_checked_against_the_tr():
    # reference: BIDS SliceTiming, seconds from the start of the volume, each within [0, TR) (from memory)
    assert check_slice_timing([0.0, 0.4, 0.2, 0.6], 0.8, SIDE) == (0.0, 0.4, 0.2, 0.6)
    assert check_slice_timing(None, 0.8, SIDE) is None
    for bad, word in (([0.0, 400.0], "milliseconds"), ([0.0, 0.8], "outside"), ([-0.1], "outside"),
                      ("0 0.4", "list"), ([], "list"), ([0.0, None], r"SliceTiming\[1\]")):
        with pytest.raises(DataError, match=word) as info:
            check_slice_timing(bad, 0.8, SIDE)
        assert SIDE in str(info.value)


# --------------------------------------------------------------------------- reading the files

def write_bold(path: Path, tr_s: float | None, unit: str = "sec", n_volumes: int = 12) -> Path:
    img = nib.Nifti1Image(np.zeros((3, 3, 2, n_volumes), dtype=np.float32), np.eye(4))
    img.header.set_zooms((3.0, 3.0, 3.0, 1.0 if tr_s is None else tr_s))
    img.header.set_xyzt_units("mm", unit if tr_s is not None else "unknown")
    nib.save(img, path)
    return path


@pytest.mark.parametrize(("value", "unit", "expected", "known"), [
    (2.0, "sec", 2.0, True), (800.0, "msec", 0.8, True), (1.5e6, "usec", 1.5, True), (2.0, "unknown", 2.0, False),
    (0.0, "sec", None, True),
])
def test_header_tr_uses_the_time_unit(tmp_path, value, unit, expected, known):
    img = nib.Nifti1Image(np.zeros((2, 2, 2, 3), dtype=np.float32), np.eye(4))
    img.header.set_zooms((1.0, 1.0, 1.0, value))
    img.header.set_xyzt_units("mm", unit)  # reference: nibabel writes the NIfTI-1 time-unit code
    nib.save(img, tmp_path / "b.nii")
    header = nib.load(tmp_path / "b.nii").header
    got = header_repetition_time_s(header)
    assert got == (None if expected is None else pytest.approx(expected, rel=1e-12))
    assert header_time_unit_known(header) is known


def test_unitless_header_is_checked_but_never_relied_on_alone():
    # nibabel's default 4D header: pixdim[4] = 1 with no unit; it says nothing about the TR
    with pytest.raises(DataError, match="pixdim\\[4\\] but no time unit"):
        rule(sidecar_path=None, header_tr_s=1.0, header_unit_known=False)
    t = rule(sidecar_path=None, header_tr_s=2.0, header_unit_known=False, configured_tr_s=2.0)
    assert (t.repetition_time_s, t.source) == (2.0, "config")
    with pytest.raises(DataError, match=r"header TR \(pixdim\[4\]\) 1 s differs from the configured "
                                        r"repetition_time_s 2 s .* no time unit"):
        rule(sidecar_path=None, header_tr_s=1.0, header_unit_known=False, configured_tr_s=2.0)
    # with a sidecar TR the unit-less header only warns when it disagrees
    with pytest.warns(GlmstepsWarning):
        assert rule(sidecar_tr_s=2.0, header_tr_s=1.0, header_unit_known=False).repetition_time_s == 2.0


def test_read_run_timing_from_sidecar_and_header(tmp_path):
    bold = write_bold(tmp_path / BOLD, 2.0)
    side = bids_sidecar_of(bold)
    assert side.name == SIDE
    side.write_text(json.dumps({"RepetitionTime": 2.0, "SliceTiming": [0.0, 1.0]}))
    t = read_run_timing(read_bold_header(bold), side, None)
    assert (t.repetition_time_s, t.source, t.slice_timing_s) == (2.0, "sidecar", (0.0, 1.0))
    side.write_text(json.dumps({"RepetitionTime": "2"}))
    with pytest.raises(DataError, match="RepetitionTime is '2'"):
        read_run_timing(read_bold_header(bold), side, None)
    side.write_text("{not json")
    with pytest.raises(DataError, match="cannot read the BIDS sidecar"):
        read_run_timing(read_bold_header(bold), side, None)
    # no sidecar: the header's TR
    assert read_run_timing(read_bold_header(bold), None, None).source == "header"
    # no unit in the header and no sidecar: no TR unless one is configured
    plain = write_bold(tmp_path / "plain_bold.nii.gz", None)  # pixdim[4] = 1 and no unit: no TR stated
    with pytest.raises(DataError, match="no repetition time"):
        read_run_timing(read_bold_header(plain), None, None)
    assert read_run_timing(read_bold_header(plain), None, 1.0).source == "config"
    with pytest.raises(DataError, match="no time unit"):  # the unit-less pixdim[4] is still a check
        read_run_timing(read_bold_header(plain), None, 1.25)


# --------------------------------------------------------------------------- a two-site study, one config

EVENTS_PARAMS = {"condition_column": "trial_type", "modulators": {}, "repetition_time_s": None,
                 "duplicate_events": "error", "missing_duration": "error"}
CONFOUND_PARAMS = {"columns": ["move_*"], "derivatives": False, "squares": False, "demean": True, "scale": False,
                   "censor": None, "drop_initial_volumes": 2, "max_censored_fraction": 0.3, "derivative_columns": []}
DESIGN_PARAMS = {"hrf": "double_gamma", "fir_bins": 10, "fir_bin_width_s": 2.0, "time_resolution_s": 0.1,
                 "drift_basis": "cosine", "cutoff_s": 128.0, "legendre_order": 3, "volume_time_fraction": 0.5,
                 "conditions": [], "modulators": {}}


def write_site_run(folder: Path, tr_s: float, n_volumes: int, header_tr_s: float) -> dict[str, str]:
    """One run: BOLD (header TR possibly wrong), BIDS sidecar with the true TR, events, confounds."""
    folder.mkdir(parents=True)
    bold = write_bold(folder / BOLD, header_tr_s, n_volumes=n_volumes)
    bids_sidecar_of(bold).write_text(json.dumps({"RepetitionTime": tr_s}))
    pd.DataFrame({"onset": [4.0, 20.0], "duration": [2.0, 2.0], "trial_type": ["go", "go"]}).to_csv(
        folder / "events.tsv", sep="\t", index=False)
    rng = np.random.default_rng(1)
    pd.DataFrame({"move_x_mm": rng.normal(0, 0.1, n_volumes)}).to_csv(folder / "confounds.tsv", sep="\t",
                                                                      index=False)
    return {"bold": str(bold), "bold_sidecar": str(bids_sidecar_of(bold)), "events": str(folder / "events.tsv"),
            "confounds": str(folder / "confounds.tsv")}


def run_chain(raw: dict[str, str], out: Path) -> dict:
    events_out = {"events": str(out / "events.tsv"), "summary": str(out / "events.json")}
    events_job.run({k: raw[k] for k in ("events", "bold", "bold_sidecar")}, events_out, EVENTS_PARAMS, {})
    confounds_out = {"confounds": str(out / "confounds.tsv"), "summary": str(out / "confounds.json"),
                     "figure": str(out / "confounds.png")}
    confounds_job.run({"confounds": raw["confounds"], "bold": raw["bold"]}, confounds_out, CONFOUND_PARAMS, {})
    design_out = {"design": str(out / "design.tsv"), "summary": str(out / "design.json"),
                  "figure": str(out / "design.png"), "correlation_figure": str(out / "design_correlation.png")}
    design_job.run({"events": events_out["events"], "events_summary": events_out["summary"],
                    "confounds": confounds_out["confounds"], "confounds_summary": confounds_out["summary"]},
                   design_out, DESIGN_PARAMS, {"subject": "01", "run_id": "task-x_run-1"})
    return json.loads(Path(design_out["summary"]).read_text())


def test_two_sites_at_different_trs_get_their_own_frame_times(tmp_path):
    # site A: TR 2.0 s, 60 volumes; site B: TR 0.8 s, 150 volumes (same 120 s); site B's header says 1.0 s
    # (a converter default), its sidecar 0.8 s: the sidecar wins (with a warning)
    sites = {"a": (2.0, 60, 2.0), "b": (0.8, 150, 1.0)}
    for site, (tr, n, header_tr) in sites.items():
        raw = write_site_run(tmp_path / site / "raw", tr, n, header_tr)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", GlmstepsWarning)
            design = run_chain(raw, tmp_path / site / "out")
        events = json.loads((tmp_path / site / "out" / "events.json").read_text())
        assert events["repetition_time_s"] == tr and events["acquisition"]["source"] == "sidecar"
        assert events["acquisition"]["source_file"] == raw["bold_sidecar"]
        assert events["provenance"]["inputs"]["bold_sidecar"]["path"].endswith(SIDE)
        assert (site == "b") == any("header TR" in w for w in events["warnings"])
        # worked by hand: kept row j is volume j + 2 (2 dropped), sampled mid-volume: (j + 2 + 0.5) x TR
        expected = (np.arange(n - 2) + 2.5) * tr
        np.testing.assert_allclose(design["frame_times_s"], expected, rtol=0, atol=1e-9)
        assert design["repetition_time_s"] == tr and design["acquisition"]["repetition_time_s"] == tr
        # the drift basis follows the run's own length: K = ceil(2 n TR / 128) - 1 (n = kept volumes)
        n_slow = sum(name.startswith("slow_") for name in design["names"])
        assert n_slow == int(np.ceil(2 * (n - 2) * tr / 128.0)) - 1


def test_one_configured_tr_stops_the_other_site_naming_its_file(tmp_path):
    raw = write_site_run(tmp_path / "b" / "raw", 0.8, 150, 0.8)
    out = tmp_path / "b" / "out"
    with pytest.raises(DataError) as info:
        events_job.run({k: raw[k] for k in ("events", "bold", "bold_sidecar")},
                       {"events": str(out / "events.tsv"), "summary": str(out / "events.json")},
                       {**EVENTS_PARAMS, "repetition_time_s": 2.0}, {})
    message = str(info.value)
    assert "\n" not in message and message.startswith(raw["bold_sidecar"]) and "0.8 s" in message
    assert not out.exists()
