"""A corpus of malformed and hostile inputs, one case each (issue 20).

Every case runs one step the way the workflow does (a job through
``glmsteps.jobs.common.run_script``, the function every rule's script or
launcher calls; config-level cases through the workflow-start checks or a
Snakemake dry run; config files through ``glmsteps.configfile.load_config``)
and asserts one of two outcomes:

- a user error: exit status 1 and ONE error line (no traceback) naming the
  file or config key and the fix; where the fix names a config option, the
  fixed config is accepted by config/schema.yaml (checked with jsonschema,
  the validator Snakemake uses);
- an accepted input: exit status 0, with the documented warning in the job's
  log and its sidecar (or, for harmless encodings such as a BOM or CRLF line
  ends, the same outputs as the plain file).

And for both: no partial output (none of the step's outputs, sidecars or
``*.tmp*`` files under the results folder) and every input file byte for byte
unchanged (sha256 before and after; hashlib, independent of glmsteps).
"""

from __future__ import annotations

import copy
import hashlib
import json
import re
import shutil
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import jsonschema
import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import yaml

from glmsteps.configfile import load_config
from glmsteps.errors import ConfigError
from glmsteps.jobs import select_confounds as confounds_job
from glmsteps.jobs import contrast as contrast_job
from glmsteps.jobs import build_design as design_job
from glmsteps.jobs import validate_events as events_job
from glmsteps.jobs import fit as fit_job
from glmsteps.jobs import group_model as group_job
from glmsteps.jobs.common import run_script
from glmsteps.precheck import MAX_NAME_LENGTH, check_config_start
from workflow_helpers import REPO, default_config, make_workspace

SCHEMA = yaml.safe_load((REPO / "config" / "schema.yaml").read_text())

# --------------------------------------------------------------------------- a tiny valid run

TR_S = 2.0
N_VOLUMES = 40
SHAPE = (5, 6, 4)
AFFINE = np.diag([3.0, 3.0, 3.0, 1.0])
EVENTS_ROWS = ["4\t10\ttap\t0.4", "24\t10\tflash\t0.6", "44\t10\ttap\t0.5", "64\t0\tflash\t0.3"]
EVENTS_HEADER = "onset\tduration\ttrial_type\trt"
WILDCARDS = {"subject": "01", "run_id": "task-demo_run-1"}


def validated_config(**changes: Any) -> dict[str, Any]:
    """The toy config validated against the schema with defaults filled in (as the workflow sees it)."""
    from snakemake.utils import validate

    config = default_config()
    config["inputs"]["root"] = "data"
    for dotted, value in changes.items():
        set_key(config, dotted, value)
    validate(config, str(REPO / "config" / "schema.yaml"), set_default=True)
    return config


def set_key(config: dict[str, Any], dotted: str, value: Any) -> None:
    *head, last = dotted.split(".")
    node = config
    for part in head:
        node = node.setdefault(part, {})
    node[last] = value


def schema_accepts(**changes: Any) -> bool:
    """Does config/schema.yaml accept the toy config with these keys set? (jsonschema, as Snakemake uses)"""
    config = default_config()
    for dotted, value in changes.items():
        set_key(config, dotted, value)
    try:
        jsonschema.validate(config, SCHEMA)
    except jsonschema.ValidationError:
        return False
    return True


CONFIG = validated_config()
EVENTS_PARAMS = {"condition_column": "trial_type", "modulators": {"tap": ["rt"]},
                 "duplicate_events": CONFIG["events"]["duplicate_events"],
                 "missing_duration": CONFIG["events"]["missing_duration"], "repetition_time_s": TR_S}
CONFOUND_PARAMS = {**copy.deepcopy(CONFIG["confounds"]), "columns": ["move_*"], "derivatives": False,
                   "censor": {"column": "displacement_mm", "threshold": 0.5, "volumes_before": 0,
                              "volumes_after": 1}}
_d = CONFIG["design"]
DESIGN_PARAMS = {"hrf": _d["hrf"], "fir_bins": _d["fir_bins"], "fir_bin_width_s": _d["fir_bin_width_s"],
                 "time_resolution_s": _d["time_resolution_s"], "drift_basis": _d["drift"]["basis"],
                 "cutoff_s": _d["drift"]["cutoff_s"], "legendre_order": _d["drift"]["legendre_order"],
                 "volume_time_fraction": CONFIG["acquisition"]["volume_time_fraction"], "conditions": [],
                 "modulators": {"tap": ["rt"]}}
_f = CONFIG["fit"]
FIT_PARAMS = {"scaling": _f["scaling"], "grand_mean_value": _f["grand_mean_value"], "autocorrelation": "ar1",
              "ar_order": 1, "ar_smoothing_fwhm_mm": 6.0, "ar_bin_width": _f["ar_bin_width"],
              "non_finite_voxels": _f["non_finite_voxels"]}


def write_events(path: Path, rows: list[str] | None = None, header: str = EVENTS_HEADER) -> Path:
    path.write_text("\n".join([header, *(EVENTS_ROWS if rows is None else rows)]) + "\n", encoding="utf-8")
    return path


def write_confounds(path: Path, n: int = N_VOLUMES, nan_at: int | None = None) -> Path:
    rng = np.random.default_rng(4)
    table = pd.DataFrame(rng.normal(0, 0.05, (n, 3)), columns=["move_x", "move_y", "move_z"])
    table["displacement_mm"] = [np.nan] + [0.1] * (n - 1)
    if nan_at is not None:
        table.loc[nan_at, "move_y"] = np.nan
    table.to_csv(path, sep="\t", index=False, na_rep="n/a")
    return path


def write_bold(path: Path, shape: tuple[int, ...] = SHAPE + (N_VOLUMES,), tr_s: float = TR_S,
               nan_voxel: bool = False, seed: int = 1) -> Path:
    rng = np.random.default_rng(seed)
    data = (800 + rng.normal(0, 10, shape)).astype(np.float32)
    if nan_voxel:
        data[2, 2, 2, 7] = np.nan
    img = nib.Nifti1Image(data, AFFINE)
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_zooms((3.0, 3.0, 3.0, tr_s)[: len(shape)])
    nib.save(img, path)
    return path


def write_mask(path: Path, shape: tuple[int, ...] = SHAPE, fill: float = 1, affine: np.ndarray = AFFINE) -> Path:
    dtype = np.uint8 if float(fill).is_integer() else np.float32
    nib.save(nib.Nifti1Image(np.full(shape, fill, dtype), affine), path)
    return path


def event_outputs(out: Path) -> dict[str, str]:
    return {"events": str(out / "events.tsv"), "summary": str(out / "events.json")}


def confound_outputs(out: Path) -> dict[str, str]:
    return {"confounds": str(out / "confounds.tsv"), "summary": str(out / "confounds.json"),
            "figure": str(out / "confounds.png")}


def design_outputs(out: Path) -> dict[str, str]:
    return {"design": str(out / "design.tsv"), "summary": str(out / "design.json"),
            "figure": str(out / "design.png"), "correlation_figure": str(out / "design_correlation.png")}


def fit_outputs(out: Path) -> dict[str, str]:
    return {"fit": str(out / "fit.h5"), "mean": str(out / "mean.nii.gz"),
            "residual_sd": str(out / "residual_sd.nii.gz"), "ar_coef": str(out / "ar_coef.nii.gz")}


def t_outputs(out: Path) -> dict[str, str]:
    return {s: str(out / f"{s}.nii.gz") for s in ("effect", "variance", "t", "z", "p")}


def f_outputs(out: Path) -> dict[str, str]:
    return {s: str(out / f"{s}.nii.gz") for s in ("f", "z", "p")}


@pytest.fixture(scope="module")
def chain(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One valid run through events, confounds, design and fit (the steps' real jobs): inputs in raw/,
    outputs in run/."""
    base = tmp_path_factory.mktemp("chain")
    raw, run = base / "raw", base / "run"
    raw.mkdir()
    inputs = {"events": write_events(raw / "events.tsv"), "confounds": write_confounds(raw / "confounds.tsv"),
              "bold": write_bold(raw / "bold.nii.gz"), "mask": write_mask(raw / "mask.nii.gz")}
    events_job.run({"events": str(inputs["events"]), "bold": str(inputs["bold"])}, event_outputs(run),
                   EVENTS_PARAMS, WILDCARDS)
    confounds_job.run({"confounds": str(inputs["confounds"]), "bold": str(inputs["bold"])}, confound_outputs(run),
                      CONFOUND_PARAMS, WILDCARDS)
    design_job.run(design_inputs(run), design_outputs(run), DESIGN_PARAMS, WILDCARDS)
    fit_job.run(fit_inputs(raw, run), fit_outputs(run), FIT_PARAMS, WILDCARDS)
    return base


def design_inputs(run: Path) -> dict[str, str]:
    return {"events": str(run / "events.tsv"), "events_summary": str(run / "events.json"),
            "confounds": str(run / "confounds.tsv"), "confounds_summary": str(run / "confounds.json")}


def fit_inputs(raw: Path, run: Path) -> dict[str, Any]:
    return {"bold": str(raw / "bold.nii.gz"), "mask": str(raw / "mask.nii.gz"), "tissue": [],
            "design": str(run / "design.tsv"), "design_summary": str(run / "design.json")}


# --------------------------------------------------------------------------- running a job as the workflow does

def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def files_under(folder: Path) -> dict[Path, str]:
    return {p: sha256(p) for p in sorted(folder.rglob("*")) if p.is_file()} if folder.exists() else {}


@dataclass
class Outcome:
    code: int
    log: list[str]
    outputs: dict[str, str]
    results: Path

    @property
    def errors(self) -> list[str]:
        return [line for line in self.log if " ERROR " in line]

    @property
    def warnings(self) -> list[str]:
        return [line for line in self.log if " WARNING " in line]


def run_job(job: Callable[..., None], inputs: dict[str, Any], outputs: dict[str, str], params: dict[str, Any],
            tmp: Path) -> Outcome:
    """Run a step through run_script (as every rule does) with its log in tmp/logs; check that the inputs
    are unchanged."""
    input_files = [Path(p) for v in inputs.values() for p in ([v] if isinstance(v, str) else v)]
    before = {p: sha256(p) for p in input_files if p.is_file()}
    log = tmp / "logs" / "step.log"
    smk = SimpleNamespace(input=inputs, output=outputs, params=params, wildcards=WILDCARDS, log=[str(log)],
                          threads=1)
    try:
        run_script(job, smk)
        code = 0
    except SystemExit as exc:
        code = int(exc.code)
    after = {p: sha256(p) for p in before}
    assert after == before, "an input file changed"
    results = Path(next(iter(outputs.values()))).parent
    return Outcome(code, log.read_text(encoding="utf-8").splitlines() if log.exists() else [], outputs, results)


_RECORD = re.compile(r"^\d{4}-\d\d-\d\d \d\d:\d\d:\d\d,\d{3} (INFO|WARNING|ERROR) \S")


def assert_user_error(outcome: Outcome, *words: str) -> str:
    """Exit 1, one error line (no traceback, nothing else but warnings) holding every word; nothing left."""
    assert outcome.code == 1, outcome.log
    assert len(outcome.errors) == 1, outcome.log
    # no traceback, no continuation line: every log line is one timestamped record
    assert all(_RECORD.match(line) for line in outcome.log), outcome.log
    line = outcome.errors[0]
    for word in words:
        assert word in line, (word, line)
    assert_nothing_left(outcome)
    return line


def assert_nothing_left(outcome: Outcome) -> None:
    for path in outcome.outputs.values():
        assert not Path(path).exists(), path
    leftovers = [p for p in outcome.results.rglob("*") if p.is_file()] if outcome.results.exists() else []
    assert leftovers == [], leftovers


def assert_no_temporaries(folder: Path) -> None:
    assert [p for p in folder.rglob("*") if ".tmp" in p.name] == []


def assert_accepted_with_warning(outcome: Outcome, sidecar: str, *words: str) -> None:
    """Exit 0, the warning in the log and in the step's sidecar, no temporaries."""
    assert outcome.code == 0, outcome.log
    assert outcome.errors == []
    assert any(all(w in line for w in words) for line in outcome.warnings), outcome.log
    recorded = json.loads(Path(outcome.outputs[sidecar]).read_text())["warnings"]
    assert any(all(w in text for w in words) for text in recorded), recorded
    assert_no_temporaries(outcome.results)


# --------------------------------------------------------------------------- events (validate_events)

def events_case(tmp: Path, rows: list[str] | None = None, header: str = EVENTS_HEADER, text: bytes | None = None,
                params: dict[str, Any] | None = None, bold: dict[str, Any] | None = None,
                bold_bytes: Callable[[bytes], bytes] | None = None, sidecar: str | None = None) -> Outcome:
    raw = tmp / "raw"
    raw.mkdir(parents=True, exist_ok=True)
    path = raw / EVENTS_FILE
    if text is not None:
        path.write_bytes(text)
    else:
        write_events(path, rows, header)
    bold_path = write_bold(raw / "bold.nii.gz", **(bold or {}))
    if bold_bytes is not None:
        bold_path.write_bytes(bold_bytes(bold_path.read_bytes()))
    inputs: dict[str, Any] = {"events": str(path), "bold": str(bold_path)}
    if sidecar is not None:
        (raw / "bold.json").write_text(sidecar, encoding="utf-8")
        inputs["bold_sidecar"] = [str(raw / "bold.json")]
    return run_job(events_job.run, inputs, event_outputs(tmp / "results"), {**EVENTS_PARAMS, **(params or {})}, tmp)


EVENTS_FILE = "sub-01_task-demo_run-1_events.tsv"

EVENTS_ERRORS: dict[str, dict[str, Any]] = {
    # name: how the file (or a setting) is broken, and the words the one line must hold
    "missing_onset_column": dict(header="start\tduration\ttrial_type\trt", words=("'onset'",)),
    "missing_condition_column": dict(header="onset\tduration\tkind\trt", words=("'trial_type'",
                                                                                 "events.condition_column")),
    "nan_onset": dict(rows=["4\t2\ttap\t0.4", "n/a\t2\ttap\t0.5"], words=("row 2", "onset")),
    "non_numeric_onset": dict(rows=["4\t2\ttap\t0.4", "soon\t2\ttap\t0.5"], words=("row 2", "onset")),
    "onset_past_scan_end": dict(rows=["4\t2\ttap\t0.4", "95\t2\ttap\t0.5"], words=("row 2", "80")),
    "negative_duration": dict(rows=["4\t-2\ttap\t0.4"], words=("row 1", "duration")),
    "duration_na": dict(rows=["4\tn/a\ttap\t0.4", "30\t10\tflash\t0.6"], words=("data rows 1", "events.missing_duration"),
                        fix={"events.missing_duration": "impulse"}),
    "duplicated_rows": dict(rows=[*EVENTS_ROWS, *EVENTS_ROWS], words=("events.duplicate_events",),
                            fix={"events.duplicate_events": "keep_first"}),
    "modulator_na_on_own_rows": dict(rows=["4\t10\ttap\tn/a", "30\t10\tflash\tn/a", "50\t10\ttap\t0.3"],
                                     words=("row 1", "'rt'")),
    "non_numeric_modulator": dict(rows=["4\t10\ttap\tfast", "50\t10\ttap\t0.3"], words=("row 1", "'rt'")),
    "empty_file": dict(text=b"", words=("empty",)),
    "blank_lines_only": dict(text=b"\n\n  \n", words=("empty",)),
    "header_only": dict(rows=[], words=()),
    "comma_delimited": dict(text=b"onset,duration,trial_type,rt\n4,10,tap,0.4\n", words=("3 commas", "tab")),
    "semicolon_delimited": dict(text=b"onset;duration;trial_type\n4;10;tap\n", words=("2 semicolons", "tab")),
    "repeated_header_column": dict(header="onset\tduration\ttrial_type\tonset", rows=["4\t2\ttap\t9"],
                                   words=("['onset']", "more than once")),
    "row_with_a_cell_too_many": dict(rows=["4\t10\ttap\t0.4", "24\t10\tflash\t0.6\textra"],
                                     words=("data row 2", "5 tab-separated cells", "header line 4")),
    "row_with_a_cell_too_few": dict(rows=["4\t10\ttap\t0.4", "24\t10\tflash"],
                                    words=("data row 2", "3 tab-separated cells")),
    "condition_na": dict(rows=["4\t10\ttap\t0.4", "24\t10\tn/a\t0.6"], words=("row 2", "'trial_type'")),
    "onsets_in_milliseconds": dict(rows=["4000\t2000\ttap\t0.4", "30000\t2000\tflash\t0.5",
                                         "70000\t2000\ttap\t0.6"], words=("milliseconds", "divide")),
    "infinite_onset": dict(rows=["inf\t2\ttap\t0.4"], words=("row 1", "'onset'")),
    "binary_file": dict(text=bytes(range(256)) * 4, words=("not UTF-8",)),
    "bold_3d": dict(bold={"shape": SHAPE}, words=("bold.nii.gz",), file="bold.nii.gz"),
    "bold_not_an_image": dict(bold_bytes=lambda b: b"not an image", words=("bold.nii.gz", "NIfTI"),
                              file="bold.nii.gz"),
    "bold_header_cut": dict(bold_bytes=lambda b: b[:200], words=("bold.nii.gz", "NIfTI"), file="bold.nii.gz"),
    "bids_sidecar_json_syntax": dict(sidecar='{"RepetitionTime": 2.0,', words=("bold.json", "line 1"),
                                     file="bold.json"),
    "bids_sidecar_tr_text": dict(sidecar='{"RepetitionTime": "2"}', words=("bold.json", "RepetitionTime"),
                                 file="bold.json"),
    "bids_sidecar_tr_negative": dict(sidecar='{"RepetitionTime": -2}', words=("bold.json", "positive"),
                                     file="bold.json"),
    "bids_sidecar_not_an_object": dict(sidecar="[1, 2]", words=("bold.json", "JSON object"), file="bold.json"),
    "tr_differs_from_config": dict(bold={"tr_s": 2.5}, words=("bold.nii.gz", "acquisition.repetition_time_s"),
                                   file="bold.nii.gz"),
    "latin1_bytes": dict(text=EVENTS_HEADER.encode() + b"\n4\t10\tcaf\xe9\t0.4\n",
                         words=("not UTF-8", "0xe9", "save it as UTF-8")),
}


@pytest.mark.parametrize("name", sorted(EVENTS_ERRORS))
def test_events_user_errors(tmp_path: Path, name: str) -> None:
    case = dict(EVENTS_ERRORS[name])
    words, fix, file = case.pop("words"), case.pop("fix", None), case.pop("file", EVENTS_FILE)
    line = assert_user_error(events_case(tmp_path, **case), file, *words)
    assert "EventsError" in line or "DataError" in line
    if fix:
        assert schema_accepts(**fix)


def test_events_duration_na_as_impulse_is_accepted_with_its_warning(tmp_path: Path) -> None:
    outcome = events_case(tmp_path, rows=["4\tn/a\ttap\t0.4", "30\t10\tflash\t0.6"],
                          params={"missing_duration": "impulse"})
    assert_accepted_with_warning(outcome, "summary", "'duration' is n/a")


@pytest.mark.parametrize("policy", ["keep_first", "keep_all"])
def test_events_duplicated_rows_kept_on_request_with_a_warning(tmp_path: Path, policy: str) -> None:
    outcome = events_case(tmp_path, rows=[*EVENTS_ROWS, EVENTS_ROWS[0]], params={"duplicate_events": policy})
    assert_accepted_with_warning(outcome, "summary", "row")
    kept = pd.read_csv(outcome.outputs["events"], sep="\t")
    assert len(kept) == len(EVENTS_ROWS) + (policy == "keep_all")


def test_events_past_the_scan_end_are_clipped_with_a_warning(tmp_path: Path) -> None:
    outcome = events_case(tmp_path, rows=["4\t10\ttap\t0.4", "70\t1e308\tflash\t0.6"])
    assert_accepted_with_warning(outcome, "summary", "extend past the end of the scan", "clipped")
    clean = pd.read_csv(outcome.outputs["events"], sep="\t")
    assert clean["duration"].tolist() == [10.0, 10.0]  # 80 s scan end - 70 s onset


def test_events_negative_onset_is_modelled(tmp_path: Path) -> None:
    # BIDS onsets are seconds from the first volume; an event before it still reaches the scan through the
    # response (BIDS 1.9 "Task events", from memory: negative onsets are allowed)
    outcome = events_case(tmp_path, rows=["-4\t10\ttap\t0.4", "24\t10\tflash\t0.6"])
    assert outcome.code == 0 and outcome.errors == []
    assert pd.read_csv(outcome.outputs["events"], sep="\t")["onset"].tolist() == [-4.0, 24.0]
    assert_no_temporaries(outcome.results)


@pytest.mark.parametrize("encoding", ["bom", "crlf"])
def test_events_bom_and_crlf_give_the_plain_file_s_outputs(tmp_path: Path, encoding: str) -> None:
    plain = "\n".join([EVENTS_HEADER, *EVENTS_ROWS]) + "\n"
    text = ("\ufeff" + plain).encode() if encoding == "bom" else plain.replace("\n", "\r\n").encode()
    odd = events_case(tmp_path / "odd", text=text)
    ref = events_case(tmp_path / "ref", text=plain.encode())
    assert odd.code == ref.code == 0 and odd.errors == []
    assert Path(odd.outputs["events"]).read_bytes() == Path(ref.outputs["events"]).read_bytes()
    summaries = [json.loads(Path(o.outputs["summary"]).read_text()) for o in (odd, ref)]
    assert summaries[0]["conditions"] == summaries[1]["conditions"]
    assert summaries[0]["warnings"] == summaries[1]["warnings"]


# --------------------------------------------------------------------------- confounds (select_confounds)

CONFOUNDS_FILE = "sub-01_task-demo_run-1_desc-nuisance_timeseries.tsv"


def confounds_case(tmp: Path, n: int = N_VOLUMES, nan_at: int | None = None, text: bytes | None = None,
                   params: dict[str, Any] | None = None) -> Outcome:
    raw = tmp / "raw"
    raw.mkdir(exist_ok=True)
    path = raw / CONFOUNDS_FILE
    if text is not None:
        path.write_bytes(text)
    else:
        write_confounds(path, n, nan_at)
    bold = write_bold(raw / "bold.nii.gz")
    return run_job(confounds_job.run, {"confounds": str(path), "bold": str(bold)},
                   confound_outputs(tmp / "results"), {**CONFOUND_PARAMS, **(params or {})}, tmp)


CONFOUNDS_ERRORS: dict[str, dict[str, Any]] = {
    "wrong_row_count": dict(n=N_VOLUMES - 3, words=(f"{N_VOLUMES - 3} data rows", f"{N_VOLUMES} volumes")),
    "missing_column": dict(params={"columns": ["move_x", "white_matter_mean"]},
                           words=("'white_matter_mean'", "confounds.columns")),
    "pattern_matches_nothing": dict(params={"columns": ["turn_*"]}, words=("'turn_*'", "confounds.columns")),
    "nan_in_selected_column": dict(nan_at=12, words=("'move_y'", "row 13")),
    "censor_column_absent": dict(params={"censor": {**CONFOUND_PARAMS["censor"], "column": "fd"}},
                                 words=("'fd'", "confounds.censor.column")),
    "empty_file": dict(text=b"", words=("empty",)),
    "comma_delimited": dict(text=("move_x,move_y,move_z,displacement_mm\n"
                                  + "0.1,0.2,0.1,0.1\n" * N_VOLUMES).encode(), words=("3 commas", "tab")),
    "repeated_column": dict(text=("move_x\tmove_y\tmove_x\tdisplacement_mm\n"
                                  + "0.1\t0.2\t0.1\t0.1\n" * N_VOLUMES).encode(), words=("['move_x']",)),
    "row_with_a_cell_too_many": dict(text=("move_x\tmove_y\tmove_z\tdisplacement_mm\n"
                                           + "0.1\t0.2\t0.1\t0.1\n" * 5 + "0.1\t0.2\t0.1\t0.1\t9\n"
                                           + "0.1\t0.2\t0.1\t0.1\n" * (N_VOLUMES - 6)).encode(),
                                     words=("data row 6", "5 tab-separated cells")),
    "non_numeric_value": dict(text=("move_x\tmove_y\tmove_z\tdisplacement_mm\n"
                                    + "".join(f"0.1\t{'big' if i == 5 else '0.2'}\t0.1\t0.1\n"
                                              for i in range(N_VOLUMES))).encode(),
                              words=("'move_y'",)),
}


@pytest.mark.parametrize("name", sorted(CONFOUNDS_ERRORS))
def test_confounds_user_errors(tmp_path: Path, name: str) -> None:
    case = dict(CONFOUNDS_ERRORS[name])
    words = case.pop("words")
    line = assert_user_error(confounds_case(tmp_path, **case), CONFOUNDS_FILE, *words)
    assert "ConfoundsError" in line


# --------------------------------------------------------------------------- BOLD and mask (fit)

def fit_case(tmp: Path, chain: Path, *, bold: dict[str, Any] | None = None, mask: dict[str, Any] | None = None,
             params: dict[str, Any] | None = None, bold_bytes: Callable[[bytes], bytes] | None = None) -> Outcome:
    raw = tmp / "raw"
    raw.mkdir(exist_ok=True)
    bold_path = write_bold(raw / "bold.nii.gz", **(bold or {}))
    if bold_bytes is not None:
        bold_path.write_bytes(bold_bytes(bold_path.read_bytes()))
    write_mask(raw / "mask.nii.gz", **(mask or {}))
    for name in ("design.tsv", "design.json"):
        shutil.copy(chain / "run" / name, raw / name)
    return run_job(fit_job.run, fit_inputs(raw, raw), fit_outputs(tmp / "results"), {**FIT_PARAMS, **(params or {})},
                   tmp)


FIT_ERRORS: dict[str, dict[str, Any]] = {
    "mask_grid_shape_differs": dict(mask={"shape": (5, 6, 5)}, words=("mask.nii.gz", "bold.nii.gz")),
    "mask_affine_differs": dict(mask={"affine": np.diag([2.0, 2.0, 2.0, 1.0])}, words=("mask.nii.gz",)),
    "mask_all_zero": dict(mask={"fill": 0}, words=("mask.nii.gz",)),
    "bold_3d": dict(bold={"shape": SHAPE}, words=("bold.nii.gz",)),
    "bold_data_truncated": dict(bold_bytes=lambda b: b[: len(b) // 2], words=("bold.nii.gz", "truncated")),
    "bold_not_an_image": dict(bold_bytes=lambda b: b"not an image", words=("bold.nii.gz", "NIfTI")),
    "bold_fewer_volumes_than_design": dict(bold={"shape": SHAPE + (N_VOLUMES - 5,)}, words=("bold.nii.gz",)),
    "non_finite_voxel": dict(bold={"nan_voxel": True}, words=("bold.nii.gz", "fit.non_finite_voxels"),
                             fix={"fit.non_finite_voxels": "drop"}),
}


@pytest.mark.parametrize("name", sorted(FIT_ERRORS))
def test_fit_user_errors(tmp_path: Path, chain: Path, name: str) -> None:
    case = dict(FIT_ERRORS[name])
    words, fix = case.pop("words"), case.pop("fix", None)
    line = assert_user_error(fit_case(tmp_path, chain, **case), *words)
    assert "DataError" in line
    if fix:
        assert schema_accepts(**fix)


def test_fit_drops_non_finite_voxels_on_request_and_says_so(tmp_path: Path, chain: Path) -> None:
    outcome = fit_case(tmp_path, chain, bold={"nan_voxel": True}, params={"non_finite_voxels": "drop"})
    assert outcome.code == 0 and outcome.errors == []
    side = json.loads((outcome.results / "fit.json").read_text())
    assert side["voxel_counts"]["non_finite"] == 1
    assert any("non-finite" in w or "NaN" in w for w in side["warnings"]), side["warnings"]
    assert any("non-finite" in line or "NaN" in line for line in outcome.warnings), outcome.log
    assert_no_temporaries(outcome.results)


def test_fit_with_a_probability_map_as_mask_warns(tmp_path: Path, chain: Path) -> None:
    outcome = fit_case(tmp_path, chain, mask={"fill": 0.3})
    assert outcome.code == 0, outcome.log
    side = json.loads((outcome.results / "fit.json").read_text())
    assert any("fractional values" in w and "binary mask" in w for w in side["warnings"]), side["warnings"]
    assert any("fractional values" in line for line in outcome.warnings)
    assert_no_temporaries(outcome.results)


# --------------------------------------------------------------------------- contrasts (contrast step)

def contrast_case(tmp: Path, chain: Path, definition: dict[str, Any], outputs: dict[str, str]) -> Outcome:
    raw = tmp / "raw"
    raw.mkdir(exist_ok=True)
    shutil.copy(chain / "run" / "fit.h5", raw / "fit.h5")
    params = {"name": "bad", "definition": definition, "tail": definition.get("tail", "two-sided"),
              "skip_nonestimable": False}
    return run_job(contrast_job.run, {"fit": str(raw / "fit.h5")}, outputs, params, tmp)


CONTRAST_ERRORS: dict[str, dict[str, Any]] = {
    "f_row_all_zero": dict(definition={"rows": [{"tap": 1}, {"flash": 0}]}, kind="F",
                           words=("contrasts.bad.rows[1]", "non-zero weight")),
    "weight_on_absent_column": dict(definition={"weights": {"horn": 1}}, kind="t", words=("'horn'",)),
    "non_numeric_weight": dict(definition={"weights": {"tap": "one"}}, kind="t",
                               words=("contrasts.bad.weights", "write a number")),
}


@pytest.mark.parametrize("name", sorted(CONTRAST_ERRORS))
def test_contrast_user_errors(tmp_path: Path, chain: Path, name: str) -> None:
    case = CONTRAST_ERRORS[name]
    outputs = (f_outputs if case["kind"] == "F" else t_outputs)(tmp_path / "results")
    line = assert_user_error(contrast_case(tmp_path, chain, case["definition"], outputs), "'bad'", *case["words"])
    assert "ContrastError" in line or "ConfigError" in line


def test_f_contrast_with_dependent_rows_tests_their_rank(tmp_path: Path, chain: Path) -> None:
    # documented in glmsteps.contrasts.f_contrast: the numerator dof is the rank of the rows' covariance
    outcome = contrast_case(tmp_path, chain, {"rows": [{"tap": 1}, {"tap": 2}]}, f_outputs(tmp_path / "results"))
    assert outcome.code == 0 and outcome.errors == []
    assert json.loads((outcome.results / "f.json").read_text())["dof1"] == 1
    assert_no_temporaries(outcome.results)


# --------------------------------------------------------------------------- participants (group step)

def group_case(tmp: Path, participants: str | bytes, site_column: str | None = "site") -> Outcome:
    """Four subjects' combined effect and variance maps; the participants table as given."""
    rng = np.random.default_rng(7)
    raw = tmp / "raw"
    effects, variances = [], []
    for s in ("01", "02", "03", "04"):
        for stat, values, into in (("effect", rng.normal(1, 0.3, SHAPE), effects),
                                   ("variance", rng.uniform(0.1, 0.2, SHAPE), variances)):
            path = raw / f"sub-{s}" / f"{stat}.nii.gz"
            path.parent.mkdir(parents=True, exist_ok=True)
            nib.save(nib.Nifti1Image(values.astype(np.float32), AFFINE), path)
            path.with_name(f"{stat}.json").write_text(json.dumps({"map": {
                "level": "subject", "subject": s, "session": None, "task": "demo", "run": None,
                "contrast": "tap", "stat": stat}}))
            into.append(str(path))
    path = raw / "participants.tsv"
    path.write_bytes(participants if isinstance(participants, bytes) else participants.encode())
    params = {"design": "one_sample", "covariates": [], "site_column": site_column, "site_as_covariate": True,
              "estimation": "ols", "harmonise_sites": False, "mask_fraction": 1.0, "tail": "two-sided",
              "contrast": {"name": "mean", "weights": {"mean": 1}}}
    out = tmp / "results"
    outputs = {**{s: str(out / f"{s}.nii.gz") for s in ("effect", "variance", "t", "z", "p")},
               "site_qc": str(out / "site_qc.json"), "site_figure": str(out / "sites.png")}
    return run_job(group_job.run, {"effect": effects, "variance": variances,
                                   "participants": str(raw / "participants.tsv")}, outputs, params, tmp)


def test_participants_without_the_site_column_is_an_error(tmp_path: Path) -> None:
    table = "participant_id\tage\nsub-01\t30\nsub-02\t31\nsub-03\t32\nsub-04\t33\n"
    line = assert_user_error(group_case(tmp_path, table), "participants.tsv", "'site'", "site_column")
    assert "GroupError" in line and schema_accepts(**{"group_models.everyone.site_column": None})


def test_participants_missing_a_subject_drops_it_with_a_warning(tmp_path: Path) -> None:
    table = "participant_id\tsite\nsub-01\ta\nsub-02\ta\nsub-03\tb\n"
    outcome = group_case(tmp_path, table)
    assert outcome.code == 0, outcome.log
    qc = json.loads(Path(outcome.outputs["site_qc"]).read_text())
    assert "04" in json.dumps(qc)
    assert any("04" in line for line in outcome.warnings), outcome.log
    assert_no_temporaries(outcome.results)


def test_participants_missing_a_site_value_drops_it_with_a_warning(tmp_path: Path) -> None:
    table = "participant_id\tsite\nsub-01\ta\nsub-02\ta\nsub-03\tb\nsub-04\tn/a\n"
    outcome = group_case(tmp_path, table)
    assert outcome.code == 0, outcome.log
    assert any("04" in line for line in outcome.warnings), outcome.log
    assert_no_temporaries(outcome.results)


PARTICIPANTS_ERRORS: dict[str, tuple[bytes, tuple[str, ...]]] = {
    "empty_file": (b"", ("empty",)),
    "comma_separated": (b"participant_id,site\nsub-01,a\nsub-02,a\nsub-03,b\nsub-04,b\n", ("1 commas", "tab")),
    "row_with_a_cell_too_many": (b"participant_id\tsite\nsub-01\ta\nsub-02\ta\tx\nsub-03\tb\nsub-04\tb\n",
                                 ("data row 2", "3 tab-separated cells")),
    "repeated_column": (b"participant_id\tsite\tsite\nsub-01\ta\tb\nsub-02\ta\tb\nsub-03\tb\ta\n"
                        b"sub-04\tb\ta\n", ("['site']", "more than once")),
    "not_utf8": (b"participant_id\tsite\nsub-01\tZ\xfcrich\nsub-02\ta\nsub-03\tb\nsub-04\tb\n",
                 ("not UTF-8", "0xfc")),
    "subject_listed_twice": (b"participant_id\tsite\nsub-01\ta\nsub-01\tb\nsub-03\tb\nsub-04\tb\n",
                             ("['01']", "more than once")),
}


@pytest.mark.parametrize("name", sorted(PARTICIPANTS_ERRORS))
def test_participants_tables_that_cannot_be_read_are_one_line_errors(tmp_path: Path, name: str) -> None:
    text, words = PARTICIPANTS_ERRORS[name]
    line = assert_user_error(group_case(tmp_path, text), "participants.tsv", *words)
    assert "GroupError" in line


@pytest.mark.parametrize("name", ["not_utf8", "row_with_a_cell_too_many"])
def test_the_report_reads_participants_with_the_same_checks(tmp_path: Path, name: str) -> None:
    from glmsteps.errors import GroupError
    from glmsteps.report.collect import read_sites

    path = tmp_path / "participants.tsv"
    path.write_bytes(PARTICIPANTS_ERRORS[name][0])
    with pytest.raises(GroupError) as info:
        read_sites(str(path), "site")
    assert "\n" not in str(info.value) and str(path) in str(info.value)
    for word in PARTICIPANTS_ERRORS[name][1]:
        assert word in str(info.value)


def test_participants_without_participant_id_is_an_error(tmp_path: Path) -> None:
    table = "subject\tsite\nsub-01\ta\nsub-02\ta\nsub-03\tb\nsub-04\tb\n"
    assert_user_error(group_case(tmp_path, table), "participants.tsv", "participant_id")


# --------------------------------------------------------------------------- config: workflow-start checks

def study_folder(tmp: Path) -> Path:
    """A working folder whose data/ holds the participants table the toy config's group model reads."""
    (tmp / "data").mkdir(parents=True, exist_ok=True)
    (tmp / "data" / "participants.tsv").write_text("participant_id\tsite\nsub-01\ta\n")
    return tmp


def test_long_contrast_name_is_a_config_error_naming_key_and_limit(tmp_path: Path) -> None:
    name = "tap_" + "x" * (MAX_NAME_LENGTH - 3)
    config = validated_config(**{f"contrasts.{name}": {"weights": {"tap": 1}}})
    with pytest.raises(ConfigError) as info:
        check_config_start(config, study_folder(tmp_path))
    message = str(info.value)
    assert "\n" not in message and "config contrasts" in message and f"at most {MAX_NAME_LENGTH}" in message
    check_config_start(validated_config(**{f"contrasts.{name[:MAX_NAME_LENGTH]}": {"weights": {"tap": 1}}}),
                       tmp_path)


def test_participants_table_missing_while_group_models_need_it(tmp_path: Path) -> None:
    with pytest.raises(ConfigError) as info:
        check_config_start(validated_config(), tmp_path)
    message = str(info.value)
    assert "\n" not in message and "config inputs.participants" in message and "participants.tsv" in message
    check_config_start(validated_config(group_models={}), tmp_path)  # no group model: no table needed


@pytest.mark.parametrize("key", ["contrasts", "thresholds.group", "group_models",
                                 "group_models.everyone.group_contrasts"])
@pytest.mark.parametrize("name", ["has space", "slash/name", "dot.name", "_leading", "x" * (MAX_NAME_LENGTH + 1)])
def test_unsafe_folder_names_are_config_errors(key: str, name: str) -> None:
    config = validated_config()
    node = config
    for part in key.split("."):
        node = node[part]
    node[name] = copy.deepcopy(next(iter(node.values())))
    with pytest.raises(ConfigError) as info:
        check_config_start(config)
    assert "\n" not in str(info.value) and f"config {key}" in str(info.value) and "rename it" in str(info.value)


@pytest.mark.parametrize("where", ["same", "inside", "derivatives_itself", "holding"])
def test_output_dir_among_the_inputs_is_refused(tmp_path: Path, where: str) -> None:
    study_folder(tmp_path)
    out = {"same": "data", "inside": "data/sub-01/glm", "derivatives_itself": "data/derivatives",
           "holding": "."}[where]
    config = validated_config(**{"inputs.root": "data", "output_dir": out})
    with pytest.raises(ConfigError) as info:
        check_config_start(config, tmp_path)
    message = str(info.value)
    assert "\n" not in message and "config output_dir" in message and "inputs.root" in message
    assert schema_accepts(output_dir="results")
    check_config_start(validated_config(**{"inputs.root": "data", "output_dir": "results"}), tmp_path)
    # the BIDS place for processed data, <root>/derivatives/<name>, is allowed (common practice)
    check_config_start(validated_config(**{"inputs.root": "data", "output_dir": "data/derivatives/glm"}), tmp_path)


# --------------------------------------------------------------------------- config: Snakemake dry runs

@pytest.fixture(scope="module")
def tiny_study(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A two-subject BIDS-style folder with the toy config's file patterns (file names and events only:
    a dry run opens no image)."""
    root = tmp_path_factory.mktemp("tiny") / "data"
    for s in ("01", "02"):
        func, anat = root / f"sub-{s}" / "func", root / f"sub-{s}" / "anat"
        func.mkdir(parents=True)
        anat.mkdir(parents=True)
        stem = f"sub-{s}_task-beacon_run-1"
        write_bold(func / f"{stem}_space-toy_desc-preproc_bold.nii.gz")
        write_events(func / f"{stem}_events.tsv", ["4\t10\ttap\t0.4", "24\t2\tflash\t0.6", "44\t2\thorn\t0.5"])
        write_confounds(func / f"{stem}_desc-nuisance_timeseries.tsv")
        write_mask(anat / f"sub-{s}_space-toy_desc-brain_mask.nii.gz")
    (root / "participants.tsv").write_text("participant_id\tsite\nsub-01\ta\nsub-02\ta\n")
    return root


DRY_RUN_ERRORS: dict[str, dict[str, Any]] = {
    # edit of the toy config -> words the one glmsteps line must hold
    "unknown_key": dict(edit={"fit.chunk_voxel": 5}, words=("chunk_voxel",)),
    "bad_enum": dict(edit={"fit.autocorrelation": "ar2"}, words=("fit.autocorrelation", "ar2")),
    "negative_number": dict(edit={"design.drift.cutoff_s": -128}, words=("design.drift.cutoff_s",)),
    "old_renamed_name": dict(edit={"design.hrf": "glover"}, words=("glover_1999",)),
    "long_contrast_name": dict(edit={"contrasts.tap_" + "y" * 120: {"weights": {"tap": 1}}},
                               words=("config contrasts", "at most 100")),
    "output_dir_is_root": dict(edit={"output_dir": "ROOT"}, words=("output_dir", "inputs.root")),
    "zero_weight_f_row": dict(edit={"contrasts.any_task.rows": [{"tap": 1}, {"flash": 0}]},
                              words=("config contrasts.any_task.rows[1]", "non-zero weight")),
    "numeric_contrast_name": dict(edit={"contrasts.1": {"weights": {"tap": 1}}}, words=("contrast name 1",
                                                                                         "quote a number")),
    "modulator_of_an_unknown_condition": dict(edit={"events.modulators": {"tapp": ["rt"]}},
                                              words=("config events.modulators.tapp", "fix the condition name")),
    "participants_file_missing": dict(edit={"inputs.participants": "nope.tsv"},
                                      words=("config inputs.participants", "nope.tsv", "everyone")),
    "empty_contrasts": dict(edit={"contrasts": {}}, words=("contrasts",)),
    "unknown_condition_in_contrast": dict(edit={"contrasts.typo": {"weights": {"tapp": 1}}},
                                          words=("contrast 'typo'", "'tapp'")),
    "group_model_takes_an_f_contrast": dict(edit={"group_models.everyone.contrasts": ["any_task"]},
                                            words=("group_models.everyone.contrasts", "any_task")),
}


@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(DRY_RUN_ERRORS))
def test_config_errors_stop_a_dry_run_in_one_line(tmp_path: Path, tiny_study: Path, name: str) -> None:
    case = DRY_RUN_ERRORS[name]
    ws = make_workspace(tmp_path / "work", tiny_study)
    config = copy.deepcopy(ws.config)
    config["group_models"]["everyone"].pop("permutation")
    for dotted, value in case["edit"].items():
        set_key(config, dotted, str(tiny_study) if value == "ROOT" else value)
    if "1" in config["contrasts"]:
        config["contrasts"][1] = config["contrasts"].pop("1")  # YAML writes it as the number 1
    before = files_under(tiny_study)
    proc = ws.snakemake("-n", "--cores", "1", config=config, check=False)
    assert proc.returncode != 0
    ours = [line for line in proc.stderr.splitlines() if line.startswith("glmsteps: ")]
    assert len(ours) == 1, proc.stderr[-3000:]
    assert "Traceback" not in proc.stderr
    for word in case["words"]:
        assert word in ours[0], (word, ours[0])
    assert files_under(tiny_study) == before
    assert not ws.results.exists() or [p for p in ws.results.rglob("*") if p.is_file()] == []


@pytest.mark.slow
def test_a_key_given_twice_in_the_config_file_stops_a_dry_run(tmp_path: Path, tiny_study: Path) -> None:
    # Snakemake's own reader keeps the last of two equal keys; the start check reads the file again
    ws = make_workspace(tmp_path / "work", tiny_study)
    text = ws.config_path.read_text()
    assert text.count("\noutput_dir:") == 1
    ws.config_path.write_text(text + "output_dir: other_results\n")
    proc = ws.snakemake("-n", "--cores", "1", check=False)
    assert proc.returncode != 0 and "Traceback" not in proc.stderr
    ours = [line for line in proc.stderr.splitlines() if line.startswith("glmsteps: ")]
    assert len(ours) == 1, proc.stderr[-3000:]
    assert str(ws.config_path) in ours[0] and "key 'output_dir' is given twice" in ours[0]
    assert not (ws.workdir / "other_results").exists() and not ws.results.exists()


# --------------------------------------------------------------------------- config files (load_config)

YAML_ERRORS: dict[str, tuple[str, str, tuple[str, ...]]] = {
    # name: (file name, text, words)
    "syntax_error": ("c.yaml", "inputs:\n  root: x\n bold: y\n", ("line 3",)),
    "unsafe_tag": ("c.yaml", "inputs:\n  root: !!python/object/apply:os.system ['touch PWNED']\n",
                   ("line 2", "!!python/object/apply:os.system", "remove the tag")),
    "unsafe_object_tag": ("c.yaml", "fit: !!python/object:collections.OrderedDict {}\n",
                          ("line 1", "!!python/object:collections.OrderedDict")),
    "duplicate_key": ("c.yaml", "contrasts:\n  tap: {weights: {tap: 1}}\n  tap: {weights: {tap: -1}}\n",
                      ("line 3", "'tap'", "line 2")),
    "tab_indent": ("c.yaml", "fit:\n\tscaling: percent\n", ("line 2",)),
    "unclosed_bracket": ("c.yaml", "confounds:\n  columns: [move_x, move_y\ndesign: {}\n", ("line 3",)),
    "json_syntax_error": ("c.json", '{"fit": {"scaling": "percent",}\n}\n', ("line 1",)),
    "empty_file": ("c.yaml", "", ("empty",)),
    "top_level_list": ("c.yaml", "- inputs\n- fit\n", ("mapping",)),
}


@pytest.mark.parametrize("name", sorted(YAML_ERRORS))
def test_config_files_that_cannot_be_read_are_one_line_errors(tmp_path: Path, name: str) -> None:
    file_name, text, words = YAML_ERRORS[name]
    path = tmp_path / file_name
    path.write_text(text, encoding="utf-8")
    before = sha256(path)
    with pytest.raises(ConfigError) as info:
        load_config(path)
    message = str(info.value)
    assert "\n" not in message and message.startswith(str(path))
    for word in words:
        assert word in message, (word, message)
    assert sha256(path) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == [file_name]  # the unsafe tag ran nothing


def test_load_config_reads_the_toy_config_as_yaml_does() -> None:
    path = REPO / "config" / "config.yaml"
    assert load_config(path) == yaml.safe_load(path.read_text())  # reference: PyYAML safe_load


def test_load_config_keeps_a_merged_key_s_override(tmp_path: Path) -> None:
    path = tmp_path / "c.yaml"
    path.write_text("base: &b {q: 0.05, method: fdr}\nthresholds:\n  group:\n    strict:\n      <<: *b\n"
                    "      q: 0.01\n")
    assert load_config(path)["thresholds"]["group"]["strict"] == {"q": 0.01, "method": "fdr"}


# --------------------------------------------------------------------------- group contrasts at the start

@pytest.mark.parametrize("design, extra", [
    ("one_sample", {}), ("regression", {"covariates": ["age", "sex"]}),
    ("two_sample", {"group_column": "group", "covariates": ["age"]}),
    ("paired", {"group_column": "group", "pair_column": "pair"}),
])
def test_group_contrast_key_rule_accepts_every_column_the_group_design_makes(design: str, extra: dict) -> None:
    # reference: the group step's own design coder (glmsteps.group.build_group_design)
    from glmsteps.group import build_group_design
    from glmsteps.precheck import group_design_columns

    table = pd.DataFrame({"age": [20.0, 31, 44, 50, 25, 38, 61, 29, 47, 33, 55, 42], "sex": list("mffmfmmffmmf"),
                          "site": list("aabbccaabbcc"), "group": ["ctl", "pat"] * 6,
                          "pair": [f"p{i // 2}" for i in range(12)]}, index=[f"{i:02d}" for i in range(1, 13)])
    spec = {"design": design, "site_column": "site", "site_as_covariate": design != "paired", **extra}
    names = build_group_design(table, design, group_column=extra.get("group_column"),
                               pair_column=extra.get("pair_column"), covariates=extra.get("covariates", ()),
                               site_column=spec["site_column"] if spec["site_as_covariate"] else None,
                               site_as_covariate=spec["site_as_covariate"]).names
    exact, prefixes = group_design_columns(spec)
    for name in names:
        assert name in exact or name.partition("[")[0] in prefixes, name


@pytest.mark.parametrize("model, weights, words", [
    ({"design": "one_sample"}, {"age": 1}, ("'age'", "one_sample", "covariates")),
    ({"design": "two_sample", "group_column": "group"}, {"mean": 1}, ("'mean'", "group[<level>]")),
    ({"design": "regression", "covariates": ["age"]}, {"agee": 1}, ("'agee'", "mean, age")),
    ({"design": "one_sample", "site_column": None}, {"site[b]": 1}, ("'site[b]'",)),
])
def test_group_contrast_key_that_names_no_design_column_stops_the_start(model: dict, weights: dict,
                                                                       words: tuple[str, ...]) -> None:
    config = validated_config(**{"group_models.m": {**model, "group_contrasts": {"g": weights}}})
    with pytest.raises(ConfigError) as info:
        check_config_start(config)
    message = str(info.value)
    assert "\n" not in message and "config group_models.m.group_contrasts.g" in message
    for word in words:
        assert word in message, (word, message)
