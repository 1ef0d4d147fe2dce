"""Tests of glmsteps.audit and the ``glmsteps audit`` / ``glmsteps diff`` commands.

Each test builds a small chain of provenance records on disk with the real
``provenance.build_record`` / ``write_sidecar`` (raw events TSV and raw BOLD-like
NIfTI -> validate_events -> fit (HDF5) -> contrast (effect, variance, z) ->
combine_runs (z map)) in ``tmp_path``, with ``tmp_path/<name>`` as the folder
the "workflow" ran in.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
from pathlib import Path
from typing import Any

import h5py
import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from glmsteps import audit, provenance
from glmsteps.cli import main
from glmsteps.errors import ProvenanceError
from glmsteps.fileio import save_nifti, write_tsv

RUN = "out/sub-01/task-a_run-1"
EVENTS_RAW = "data/sub-01/func/sub-01_task-a_run-1_events.tsv"
BOLD_RAW = "data/sub-01/func/sub-01_task-a_run-1_bold.nii"
TARGET = "out/sub-01/combined/contrast-a/z.nii.gz"

EVENTS_PARAMS = {"condition_column": "trial_type", "modulators": [], "repetition_time_s": 2.0}
FIT_PARAMS = {"autocorrelation": "ar1", "ar_smoothing_fwhm_mm": 0.0, "repetition_time_s": 2.0}
CONTRAST_PARAMS = {"name": "a", "definition": {"a": 1.0}, "tail": "two-sided"}
COMBINE_PARAMS = {"name": "a", "tail": "two-sided"}


def _bold_bytes() -> bytes:
    """A tiny deterministic uncompressed 4D NIfTI (the same bytes every call)."""
    rng = np.random.default_rng(7)
    img = nib.Nifti1Image(rng.normal(100.0, 1.0, (2, 2, 2, 6)).astype(np.float32), np.eye(4))
    return img.to_bytes()


def _write_map(path: Path, record: dict[str, Any], stat: str, value: float) -> None:
    provenance.write_sidecar(path, record, map={"level": "run", "stat": stat})
    save_nifti(path, np.full((2, 2, 2), value, dtype=np.float32), np.eye(4))


def make_chain(base: Path, fit_params: dict[str, Any] | None = None,
               events_rows: list[tuple[float, float, str]] | None = None) -> Path:
    """Write the fake study and its four-step chain under ``base``; return the target map."""
    base.mkdir(parents=True, exist_ok=True)
    with contextlib.chdir(base):  # records store paths relative to the working folder
        Path(EVENTS_RAW).parent.mkdir(parents=True, exist_ok=True)
        rows = events_rows or [(0.0, 2.0, "a"), (6.0, 2.0, "b")]
        Path(EVENTS_RAW).write_text("onset\tduration\ttrial_type\n"
                                    + "".join(f"{o}\t{d}\t{c}\n" for o, d, c in rows), encoding="utf-8")
        Path(BOLD_RAW).write_bytes(_bold_bytes())

        rec = provenance.build_record("validate_events", EVENTS_PARAMS, {"events": EVENTS_RAW, "bold": BOLD_RAW})
        provenance.write_sidecar(f"{RUN}/events.tsv", rec)
        write_tsv(f"{RUN}/events.tsv", pd.DataFrame(rows, columns=["onset", "duration", "condition"]))

        rec = provenance.build_record("fit", fit_params or FIT_PARAMS,
                                      {"bold": BOLD_RAW, "events": f"{RUN}/events.tsv"})
        provenance.write_sidecar(f"{RUN}/fit.h5", rec)
        with h5py.File(f"{RUN}/fit.h5", "w") as handle:
            handle.attrs["provenance"] = json.dumps(rec)
            handle.create_dataset("estimates/beta", data=np.ones((2, 3), dtype=np.float32))

        rec = provenance.build_record("contrast", CONTRAST_PARAMS, {"fit": f"{RUN}/fit.h5"})
        for stat, value in (("effect", 1.0), ("variance", 0.5), ("z", 1.4)):
            _write_map(Path(f"{RUN}/contrast-a/{stat}.nii.gz"), rec, stat, value)

        rec = provenance.build_record("combine_runs", COMBINE_PARAMS,
                                      {"effect": [f"{RUN}/contrast-a/effect.nii.gz"],
                                       "variance": [f"{RUN}/contrast-a/variance.nii.gz"]})
        # as a workflow job writes it (glmsteps.jobs.common.run_script): sidecar after the map,
        # with the map's own sha256
        with provenance.deferred_sidecars() as pending:
            _write_map(Path(TARGET), rec, "z", 1.4)
            provenance.write_deferred_sidecars(pending, [TARGET])
    return base / TARGET


def run_cli(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


# --- independent re-implementation of the hash formulas ------------------------------------

def _sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()  # reference: hashlib (FIPS 180-4 SHA-256)


def _canonical(obj: Any) -> bytes:
    # reference: RFC 8259 JSON, written with sorted keys and no insignificant whitespace
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


def _lineage(step: str, params: dict[str, Any], inputs: dict[str, Any]) -> str:
    payload = {"step": step, "params_hash": _sha256_bytes(_canonical(params)), "inputs": inputs}
    return _sha256_bytes(_canonical(payload))


# --- tests ----------------------------------------------------------------------------------

def test_audit_lists_every_step_and_raw_input_once(tmp_path: Path) -> None:
    target = make_chain(tmp_path / "w")
    chain = audit.load_chain(target)
    # reference: the chain written by make_chain (4 steps, 2 raw files)
    assert [n.step for n in audit.iter_steps(chain)] == ["combine_runs", "contrast", "fit", "validate_events"]
    assert sorted(f.path for f in audit.raw_inputs(chain)) == sorted([BOLD_RAW, EVENTS_RAW])
    assert Path(chain.root) == (tmp_path / "w").resolve()
    text = audit.render_text(chain)
    for step in ("combine_runs", "contrast", "fit", "validate_events"):
        assert f"] {step}  params" in text
    assert EVENTS_RAW in text and BOLD_RAW in text
    # contrast is reached through effect and variance: shown once, then referenced
    assert text.count("[2] contrast  params") == 1
    assert "-> step [2] contrast (shown above)" in text
    contrast = chain.top.inputs[0].producer
    assert contrast is not None and contrast.outputs == [f"{RUN}/contrast-a/effect.nii.gz",
                                                          f"{RUN}/contrast-a/variance.nii.gz"]
    # settings in plain words, hashes in the short form
    assert "settings: repetition time: 2 s; autocorrelation model: ar1; smoothing of AR coefficients: 0 mm FWHM" in text
    assert f"params {chain.top.params_hash[:12]}  lineage {chain.top.lineage_hash[:12]}" in text
    assert chain.top.lineage_hash not in text


def test_plain_words_known_and_unknown_keys() -> None:
    # plain-word rendering of the settings (labels: config/schema.yaml's titles, glmsteps.settings.setting_labels)
    words = audit.describe_params({"autocorrelation": "ar1", "ar_smoothing_fwhm_mm": 0})
    assert "; ".join(words) == "autocorrelation model: ar1; smoothing of AR coefficients: 0 mm FWHM"
    # unknown keys fall back to the key itself; nested sections get dotted keys
    assert audit.describe_params({"frobnicate_level": 3}) == ["frobnicate_level: 3"]
    assert audit.describe_params({"fit": {"autocorrelation": "ols"}, "skip_nonestimable": True}) == [
        "skip runs where the contrast is not estimable: yes", "fit autocorrelation model: ols"]


def test_json_round_trips_with_full_hashes(tmp_path: Path) -> None:
    chain = audit.load_chain(make_chain(tmp_path / "w"))
    text = audit.render_json(chain)
    data = json.loads(text)  # reference: RFC 8259 JSON via the standard json module
    assert audit.chain_from_dict(data) == chain
    assert data["top"]["lineage_hash"] == chain.top.lineage_hash and len(chain.top.lineage_hash) == 64
    # the second path to the contrast step is a reference, not a copy
    variance = data["top"]["inputs"][1]
    assert variance["name"] == "variance" and variance["producer"] == {"see_step": 2}
    assert {r["path"] for r in data["raw_inputs"]} == {EVENTS_RAW, BOLD_RAW}


def test_lineage_matches_independent_sha256_of_canonical_json(tmp_path: Path) -> None:
    base = tmp_path / "w"
    chain = audit.load_chain(make_chain(base))
    events_raw = _sha256_bytes((base / EVENTS_RAW).read_bytes())
    bold_raw = _sha256_bytes((base / BOLD_RAW).read_bytes())
    # a raw input's lineage is its content hash; a step's combines step, params_hash, input lineages
    ev = _lineage("validate_events", EVENTS_PARAMS, {"events": events_raw, "bold": bold_raw})
    fit = _lineage("fit", FIT_PARAMS, {"bold": bold_raw, "events": ev})
    con = _lineage("contrast", CONTRAST_PARAMS, {"fit": fit})
    top = _lineage("combine_runs", COMBINE_PARAMS, {"effect": [con], "variance": [con]})
    steps = {n.step: n for n in audit.iter_steps(chain)}
    assert steps["validate_events"].lineage_hash == ev
    assert steps["fit"].lineage_hash == fit
    assert steps["contrast"].lineage_hash == con
    assert chain.top.lineage_hash == top
    assert steps["fit"].params_hash == _sha256_bytes(_canonical(FIT_PARAMS))
    assert all(not n.issues for n in steps.values())


def test_lineage_independent_of_absolute_folder_and_mtimes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    one = make_chain(tmp_path / "first" / "deep")
    two = make_chain(tmp_path / "second")
    for folder, stamp in ((tmp_path / "first", 1_000_000_000), (tmp_path / "second", 1_700_000_000)):
        for dirpath, _dirs, files in os.walk(folder):
            for name in files:
                os.utime(Path(dirpath) / name, (stamp, stamp))
    assert (one.stat().st_mtime, two.stat().st_mtime) == (1_000_000_000, 1_700_000_000)
    a, b = audit.load_chain(one), audit.load_chain(two)
    assert a.root != b.root
    assert a.top.lineage_hash == b.top.lineage_hash
    code, out, _ = run_cli(capsys, "diff", one, two)
    assert code == 0 and "identical lineage" in out


def test_verify_passes_then_names_an_edited_events_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    target = make_chain(tmp_path / "w")
    code, out, _ = run_cli(capsys, "audit", target, "--verify")
    assert code == 0 and "verify: all 7 file(s) match" in out  # 6 inputs and the audited map itself
    with open(tmp_path / "w" / EVENTS_RAW, "a", encoding="utf-8") as handle:
        handle.write("12.0\t2.0\ta\n")
    code, out, _ = run_cli(capsys, "audit", target, "--verify")
    changed = [line for line in out.splitlines() if line.startswith("CHANGED")]
    assert code == 1
    assert len(changed) == 1 and EVENTS_RAW in changed[0]


def test_verify_names_an_edited_binary_bold(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    target = make_chain(tmp_path / "w")
    bold = tmp_path / "w" / BOLD_RAW
    data = bytearray(bold.read_bytes())
    data[-1] ^= 0x01  # one bit of the last voxel value
    bold.write_bytes(bytes(data))
    code, out, _ = run_cli(capsys, "audit", target, "--verify", "--json")
    assert code == 1
    report = json.loads(out)["verify"]
    bad = {(c["path"], c["status"]) for c in report["checks"] if c["status"] != "ok"}
    # the BOLD is read by validate_events and by fit; both reads are named
    assert bad == {(BOLD_RAW, "changed")}
    assert sum(c["path"] == BOLD_RAW for c in report["checks"]) == 2
    assert report["ok"] is False


def test_verify_intermediate_missing_and_changed(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    target = make_chain(tmp_path / "w")
    (tmp_path / "w" / RUN / "contrast-a" / "variance.nii.gz").unlink()
    with h5py.File(tmp_path / "w" / RUN / "fit.h5", "a") as handle:
        handle["estimates/beta"][0, 0] = 2.0
    code, out, _ = run_cli(capsys, "audit", target, "--verify")
    assert code == 1
    assert f"MISSING: {RUN}/contrast-a/variance.nii.gz" in out
    assert f"CHANGED: {RUN}/fit.h5" in out


def test_stale_and_edited_records_are_reported(tmp_path: Path) -> None:
    base = tmp_path / "w"
    target = make_chain(base)
    # remake the events step with another setting after fit read its output (same bytes)
    with contextlib.chdir(base):
        rec = provenance.build_record("validate_events", {**EVENTS_PARAMS, "condition_column": "cond"},
                                      {"events": EVENTS_RAW, "bold": BOLD_RAW})
        provenance.write_sidecar(f"{RUN}/events.tsv", rec)
    # and edit a setting in the fit sidecar by hand, leaving its hashes
    side = base / RUN / "fit.json"
    record = json.loads(side.read_text())
    record["params"]["autocorrelation"] = "ols"
    side.write_text(json.dumps(record))
    chain = audit.load_chain(target)
    checks = audit.verify_chain(chain, lambda p: audit.current_sha256(p, chain.root))
    problems = {(c.path, c.status) for c in checks if c.status != "ok"}
    assert problems == {(f"{RUN}/events.tsv", "stale"), (f"{RUN}/fit.h5", "record_inconsistent")}


def test_missing_intermediate_record_is_unresolved(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    target = make_chain(tmp_path / "w")
    (tmp_path / "w" / RUN / "events.json").unlink()
    chain = audit.load_chain(target)
    fit = next(n for n in audit.iter_steps(chain) if n.step == "fit")
    events = next(f for f in fit.inputs if f.name == "events")
    assert events.kind == "unresolved" and events.step == "validate_events"
    assert EVENTS_RAW not in audit.render_text(chain)  # the chain stops there
    code, out, _ = run_cli(capsys, "audit", target, "--verify")
    assert code == 1 and f"RECORD MISSING: {RUN}/events.tsv" in out


def test_hdf5_record_read_from_root_attribute(tmp_path: Path) -> None:
    base = tmp_path / "w"
    make_chain(base)
    (base / RUN / "fit.json").unlink()
    chain = audit.load_chain(base / RUN / "fit.h5")
    assert chain.top.step == "fit" and not chain.top.issues
    assert [n.step for n in audit.iter_steps(chain)] == ["fit", "validate_events"]


def test_root_found_from_another_folder_and_given_explicitly(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                             capsys: pytest.CaptureFixture[str]) -> None:
    target = make_chain(tmp_path / "w")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    assert run_cli(capsys, "audit", target, "--verify")[0] == 0
    assert run_cli(capsys, "audit", target, "--verify", "--root", tmp_path / "w")[0] == 0
    # a wrong root makes every recorded relative path missing
    code, out, _ = run_cli(capsys, "audit", target, "--verify", "--root", elsewhere)
    assert code == 1 and f"MISSING: {EVENTS_RAW}" not in out  # the chain stops at the unreadable records
    assert f"MISSING: {RUN}/contrast-a/effect.nii.gz" in out


def test_diff_names_the_one_changed_setting(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    a = make_chain(tmp_path / "a")
    b = make_chain(tmp_path / "b", fit_params={**FIT_PARAMS, "autocorrelation": "ols"})
    result = audit.diff_chains(audit.load_chain(a), audit.load_chain(b))
    # reference: the single setting changed between the two builds above
    assert result.settings == [audit.SettingDifference("fit", f"{RUN}/fit.h5", f"{RUN}/fit.h5",
                                                       "autocorrelation", "ar1", "ols")]
    assert result.inputs == [] and result.structure == []
    code, out, _ = run_cli(capsys, "diff", a, b)
    assert code == 1
    assert f"fit ({RUN}/fit.h5)  autocorrelation (autocorrelation model): ar1 | ols" in out


def test_diff_names_a_changed_raw_input(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    a = make_chain(tmp_path / "a")
    b = make_chain(tmp_path / "b", events_rows=[(0.0, 2.0, "a"), (8.0, 2.0, "b")])
    code, out, _ = run_cli(capsys, "diff", a, b, "--json")
    data = json.loads(out)
    assert code == 1 and data["identical"] is False and data["settings"] == []
    assert [(d["step"], d["name"], d["path_a"]) for d in data["inputs"]] == [("validate_events", "events", EVENTS_RAW)]
    sha_a = _sha256_bytes((tmp_path / "a" / EVENTS_RAW).read_bytes())
    assert data["inputs"][0]["sha256_a"] == sha_a


def test_diff_of_different_steps_is_structural() -> None:
    def node(number: int, step: str, lineage: str) -> audit.StepNode:
        return audit.StepNode(number, step, [f"{step}.nii.gz"], {}, "p", lineage)

    a = audit.Chain("x", "", node(1, "contrast", "l1"))
    b = audit.Chain("y", "", node(1, "combine_runs", "l2"))
    result = audit.diff_chains(a, b)
    assert not result.identical and result.settings == [] and result.inputs == []
    assert result.structure[0].detail == "made by step contrast in A but combine_runs in B"


def test_user_errors_exit_2_with_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = run_cli(capsys, "audit", tmp_path / "nope.nii.gz")
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1 and "no such file" in err
    raw = tmp_path / "raw.tsv"
    raw.write_text("onset\n1\n")
    code, _, err = run_cli(capsys, "audit", raw)
    assert code == 2 and len(err.strip().splitlines()) == 1 and "no provenance record" in err
    target = make_chain(tmp_path / "w")
    code, _, err = run_cli(capsys, "diff", target, raw)
    assert code == 2 and "raw.tsv" in err
    code, _, err = run_cli(capsys, "audit", target, "--root", tmp_path / "absent")
    assert code == 2 and "--root" in err


def test_malformed_record_is_a_provenance_error() -> None:
    with pytest.raises(ProvenanceError, match="'lineage_hash'"):
        audit.build_chain("z.nii.gz", {"step": "fit", "params": {}, "params_hash": "x", "inputs": {}},
                          lambda p: None)


def test_verify_notices_an_edit_to_the_audited_map_itself(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Issue 20.4: the map's own sha256 is recorded when written and checked by --verify."""
    target = make_chain(tmp_path / "w")
    side = json.loads(provenance.sidecar_path(target).read_text())
    # reference: hashlib sha256 of the map's bytes
    assert side[provenance.OUTPUT_HASHES_KEY] == {"z.nii.gz": _sha256_bytes(target.read_bytes())}
    code, out, _ = run_cli(capsys, "audit", target, "--verify")
    assert code == 0 and "all" in out.splitlines()[-1]
    save_nifti(target, np.full((2, 2, 2), 9.9, dtype=np.float32), np.eye(4))   # the map edited in place
    code, out, _ = run_cli(capsys, "audit", target, "--verify", "--json")
    assert code == 1
    bad = [c for c in json.loads(out)["verify"]["checks"] if c["status"] != "ok"]
    assert [(Path(c["path"]).name, c["status"], c["found"]) for c in bad] == \
        [("z.nii.gz", "changed", _sha256_bytes(target.read_bytes()))]


def test_verify_of_a_map_without_a_recorded_hash_says_so_and_passes(tmp_path: Path,
                                                                    capsys: pytest.CaptureFixture[str]) -> None:
    target = make_chain(tmp_path / "w")
    side = provenance.sidecar_path(target)
    data = json.loads(side.read_text())
    del data[provenance.OUTPUT_HASHES_KEY]          # as written by glmsteps before it recorded them
    side.write_text(json.dumps(data))
    code, out, _ = run_cli(capsys, "audit", target, "--verify")
    assert code == 0
    assert any(line.startswith("NOTE: ") and "recorded no sha256" in line for line in out.splitlines())


def _fan_in_chain(base: Path, fit_params: dict[str, Any], data_folder: str = "data") -> Path:
    """Three runs fitted with the same settings, combined into one map (records as the jobs write them)."""
    base.mkdir(parents=True, exist_ok=True)
    with contextlib.chdir(base):
        fits = []
        for run in (1, 2, 3):
            raw = Path(f"{data_folder}/sub-01_run-{run}_bold.nii")
            raw.parent.mkdir(parents=True, exist_ok=True)
            raw.write_bytes(_bold_bytes() + bytes([run]))
            rec = provenance.build_record("fit", fit_params, {"bold": str(raw)})
            fit = Path(f"out/run-{run}/fit.json.txt")
            provenance.write_sidecar(fit, rec)
            fit.parent.mkdir(parents=True, exist_ok=True)
            fit.write_text(f"fit {run}\n")
            fits.append(str(fit))
        rec = provenance.build_record("combine_runs", COMBINE_PARAMS, {"fit": fits})
        _write_map(Path(TARGET), rec, "z", 1.0)
    return base / TARGET


def test_short_audit_shows_each_step_once_and_full_audit_each_setting_once(tmp_path, capsys):
    """Issue 21: a chain with many jobs of one step prints each step's settings once by default."""
    target = _fan_in_chain(tmp_path / "w", FIT_PARAMS)
    chain = audit.load_chain(target)
    short = audit.render_summary(chain)
    fit_lines = [line for line in short.splitlines() if line.strip().startswith("fit (")]
    assert fit_lines == [fit_lines[0]] and "3 jobs" in fit_lines[0] and "autocorrelation model: ar1" in fit_lines[0]
    assert "bold: 3 file(s)" in short and short.count("autocorrelation model") == 1
    code, out, _ = run_cli(capsys, "audit", target)
    assert code == 0 and out == short
    full = audit.render_text(chain)
    assert full.count("autocorrelation model: ar1") == 1 and full.count("settings: as step [2]") == 2
    code, out, _ = run_cli(capsys, "audit", target, "--full")
    assert out == full


def test_diff_never_counts_a_path_alone_as_a_difference(tmp_path, capsys):
    """Issue 21: the same raw bytes under another folder are the same input."""
    a = _fan_in_chain(tmp_path / "a", FIT_PARAMS, data_folder="data")
    b = _fan_in_chain(tmp_path / "b", {**FIT_PARAMS, "autocorrelation": "ols"}, data_folder="elsewhere/raw")
    result = audit.diff_chains(audit.load_chain(a), audit.load_chain(b))
    assert not result.identical and result.inputs == [] and result.structure == []
    assert {(d.step, d.key, d.value_a, d.value_b) for d in result.settings} == {("fit", "autocorrelation", "ar1", "ols")}
    same = _fan_in_chain(tmp_path / "c", FIT_PARAMS, data_folder="moved")
    code, out, _ = run_cli(capsys, "diff", a, same)
    assert code == 0 and "identical lineage" in out


def test_a_null_setting_is_shown_with_what_it_means() -> None:
    # a null AR smoothing is twice the voxel size (config/schema.yaml null_means), never "none"
    lines = audit.describe_params({"ar_smoothing_fwhm_mm": None, "autocorrelation": "arp"})
    assert "smoothing of AR coefficients: twice the run's voxel size (the value used is in fit.json)" in lines
    assert not any(line.endswith(": none") for line in lines)
    assert audit.describe_params({"ar_smoothing_fwhm_mm": 0}) == ["smoothing of AR coefficients: 0 mm FWHM"]
