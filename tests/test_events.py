"""Tests of glmsteps.events: events-table validation.

Fixtures are small TSV files written to tmp_path and read with the project's
BIDS reader, so that ``n/a`` handling and row numbering are exercised exactly
as a user's file would be.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from glmsteps.errors import ConfigError, EventsError, GlmstepsWarning
from glmsteps.events import clip_durations, find_duplicate_events, find_overlaps, validate_events
from glmsteps.fileio import read_tsv

TR_S = 2.0
N_VOLUMES = 10  # scan end 20 s


def write_events(tmp_path: Path, rows: list[str], header: str = "onset\tduration\ttrial_type",
                 name: str = "sub-01_task-demo_run-1_events.tsv") -> Path:
    path = tmp_path / name
    path.write_text("\n".join([header, *rows]) + "\n", encoding="utf-8")
    return path


def run_validate(path: Path, **kwargs):
    kwargs.setdefault("n_volumes", N_VOLUMES)
    kwargs.setdefault("repetition_time_s", TR_S)
    return validate_events(read_tsv(path), source=str(path), **kwargs)


def tsv_line_of_row(path: Path, data_row: int) -> str:
    """The text line holding 1-based data row ``data_row`` (line 0 is the header)."""
    return path.read_text(encoding="utf-8").splitlines()[data_row]


# --------------------------------------------------------------------------- clean tables

def test_clean_table_is_sorted_typed_and_summarised(tmp_path):
    path = write_events(tmp_path, ["8\t1.5\tgo\t0.61", "2\t1\tstop\t0.40", "4\t1.5\tgo\t0.52", "12\t0\tstop\t0.47"],
                        header="onset\tduration\ttrial_type\trt")
    with warnings.catch_warnings():
        warnings.simplefilter("error", GlmstepsWarning)  # a clean table raises no warning
        clean, summary = run_validate(path, modulators={"go": ["rt"], "stop": ["rt"]})

    raw = pd.read_csv(path, sep="\t")  # reference: pandas' own TSV reader, independent of glmsteps
    expected = raw.sort_values("onset", kind="stable").reset_index(drop=True)
    assert list(clean.columns) == ["onset", "duration", "condition", "rt"]
    np.testing.assert_array_equal(clean["onset"], expected["onset"])
    np.testing.assert_array_equal(clean["duration"], expected["duration"])
    np.testing.assert_array_equal(clean["rt"], expected["rt"])
    assert list(clean["condition"]) == list(expected["trial_type"])
    assert clean["onset"].dtype == np.float64 and clean["rt"].dtype == np.float64

    grouped = raw.groupby("trial_type")["duration"].agg(["count", "sum"])  # reference: pandas groupby
    assert summary["n_events"] == summary["n_rows"] == len(raw)
    assert summary["duplicate_rows"] == summary["missing_durations"] == 0
    assert summary["conditions"] == {name: {"count": int(row["count"]), "total_duration_s": float(row["sum"])}
                                     for name, row in grouped.iterrows()}
    # common practice: the scan covers n_volumes x TR seconds
    assert summary["scan_end_s"] == N_VOLUMES * TR_S
    assert summary["clipped"] == 0


def test_condition_column_and_text_names_survive(tmp_path):
    # BIDS lets any column name the condition; 'NA' and 'null' are ordinary text there
    # reference: BIDS specification, "Task events" (only n/a marks a missing value)
    path = write_events(tmp_path, ["1\t1\tNA", "3\t1\tnull"], header="onset\tduration\tcond")
    clean, summary = run_validate(path, condition_column="cond")
    assert list(clean["condition"]) == ["NA", "null"]
    assert set(summary["conditions"]) == {"NA", "null"}


def test_ties_keep_file_order(tmp_path):
    path = write_events(tmp_path, ["5\t1\tb", "5\t1\ta", "1\t1\tc"])
    clean, _ = run_validate(path)
    assert list(clean["condition"]) == ["c", "b", "a"]  # stable sort: equal onsets as in the file


# --------------------------------------------------------------------------- errors

ERROR_CASES = {
    # name: (header, rows, kwargs, (bad data row, its cell text) or None, column, words in the message)
    "missing duration column": ("onset\ttrial_type", ["1\tgo"], {}, None, "duration", ["onset", "trial_type"]),
    "missing condition column": ("onset\tduration\tcond", ["1\t1\tgo"], {}, None, "trial_type", ["cond"]),
    "non-numeric onset": ("onset\tduration\ttrial_type", ["1\t1\tgo", "abc\t1\tgo"], {}, (2, "abc"), "onset",
                          ["'abc'"]),
    "n/a onset": ("onset\tduration\ttrial_type", ["1\t1\tgo", "3\t1\tgo", "n/a\t1\tgo"], {}, (3, "n/a"),
                  "onset", ["n/a"]),
    "non-numeric duration": ("onset\tduration\ttrial_type", ["1\tlong\tgo"], {}, (1, "long"), "duration",
                             ["'long'"]),
    "negative duration": ("onset\tduration\ttrial_type", ["1\t1\tgo", "3\t-0.5\tgo"], {}, (2, "-0.5"),
                          "duration", ["-0.5", ">= 0"]),
    "missing condition": ("onset\tduration\ttrial_type", ["1\t1\tgo", "3\t1\tn/a"], {}, (2, "n/a"),
                          "trial_type", ["n/a"]),
    "onset after scan end": ("onset\tduration\ttrial_type", ["1\t1\tgo", "4\t1\tgo", "25\t1\tgo"], {},
                             (3, "25"), "onset", ["25", "20 s"]),
    "onset in milliseconds": ("onset\tduration\ttrial_type", ["1000\t500\tgo", "15000\t500\tgo"], {},
                              (2, "15000"), "onset", ["milliseconds", "divide", "1000"]),
    "missing modulator column": ("onset\tduration\ttrial_type", ["1\t1\tgo"], {"modulators": {"go": ["rt"]}},
                                 None, "rt", ["onset", "duration", "trial_type"]),
    "non-numeric modulator": ("onset\tduration\ttrial_type\trt", ["1\t1\tgo\t0.4", "3\t1\tgo\tslow"],
                              {"modulators": {"go": ["rt"]}}, (2, "slow"), "rt", ["'slow'", "'go'"]),
    "n/a modulator": ("onset\tduration\ttrial_type\trt", ["1\t1\tgo\tn/a", "3\t1\tgo\t0.5"],
                      {"modulators": {"go": ["rt"]}}, (1, "n/a"), "rt", ["n/a", "events.modulators.go"]),
    "n/a duration": ("onset\tduration\ttrial_type", ["1\t1\tgo", "3\tn/a\tgo", "8\tn/a\tstop"], {}, None,
                     "duration", ["data rows 2, 3", "n/a", "events.missing_duration"]),
}


@pytest.mark.parametrize("case", list(ERROR_CASES))
def test_each_error_names_file_row_column_on_one_line(tmp_path, case):
    header, rows, kwargs, bad, column, words = ERROR_CASES[case]
    path = write_events(tmp_path, rows, header=header)
    with pytest.raises(EventsError) as info:
        run_validate(path, **kwargs)
    message = str(info.value)
    assert "\n" not in message
    assert path.name in message
    assert f"'{column}'" in message
    for word in words:
        assert word in message
    if bad is not None:
        row, cell = bad
        assert f"data row {row} (1-based" in message
        # the row number points at the line a reader sees in the file (header line not counted)
        assert cell in tsv_line_of_row(path, row).split("\t")


def test_onset_exactly_at_scan_end_is_an_error(tmp_path):
    # common practice: a volume-based scan has no data at or after n_volumes x TR
    path = write_events(tmp_path, ["20\t0\tgo"])
    with pytest.raises(EventsError, match="at or after the end"):
        run_validate(path)


def test_empty_table_is_an_error(tmp_path):
    path = write_events(tmp_path, [])
    with pytest.raises(EventsError, match="no data rows"):
        run_validate(path)


@pytest.mark.parametrize("kwargs", [{"repetition_time_s": 0.0}, {"repetition_time_s": float("nan")},
                                    {"modulators": ["rt"]}, {"modulators": {"go": "rt"}},
                                    {"modulators": {"go": ["duration"]}}, {"modulators": {"go": ["rt", "rt"]}},
                                    {"duplicate_events": "drop"}, {"missing_duration": "zero"}])
def test_invalid_settings_are_config_errors(tmp_path, kwargs):
    path = write_events(tmp_path, ["1\t1\tgo\t0.3"], header="onset\tduration\ttrial_type\trt")
    with pytest.raises(ConfigError) as info:
        run_validate(path, **kwargs)
    assert "\n" not in str(info.value)


# --------------------------------------------------------------------------- warnings

def test_na_duration_is_an_impulse_only_when_asked(tmp_path):
    # reference: BIDS specification 1.9, "Task events" (duration may be n/a; an impulse has duration 0; from
    # memory). An n/a on a long block would silently become an impulse, so it is an error by default.
    path = write_events(tmp_path, ["1\t1\tgo", "3\tn/a\tgo", "5\tn/a\tstop"])
    with pytest.raises(EventsError, match="events.missing_duration"):
        run_validate(path)
    with pytest.warns(GlmstepsWarning) as caught:
        clean, summary = run_validate(path, missing_duration="impulse")
    np.testing.assert_array_equal(clean["duration"], [1.0, 0.0, 0.0])
    assert summary["missing_durations"] == 2
    text = " ".join(str(w.message) for w in caught)
    assert "data rows 2, 3" in text and path.name in text and "'duration'" in text


def test_na_duration_on_a_block_would_flip_the_effect():
    """Why n/a durations are an error: modelled as impulses, a block-minus-event effect changes sign (issue 20).

    Simulated voxel: 1 % during three 20 s blocks, 2 % for three 2 s events, so block - brief = -1 %.
    """
    from glmsteps import design as gd
    ft = gd.frame_times(100, 2.0)
    events = pd.DataFrame({"onset": [10.0, 70.0, 130.0, 40.0, 100.0, 160.0],
                           "duration": [20.0, 20.0, 20.0, 2.0, 2.0, 2.0], "condition": ["block"] * 3 + ["brief"] * 3})
    design = gd.build_design(events, ft, drift_basis="none")
    assert design.names == ("block", "brief", "intercept")
    y = design.X @ np.array([1.0, 2.0, 0.0])
    impulses = events.assign(duration=np.where(events["condition"] == "block", 0.0, events["duration"]))
    wrong = gd.build_design(impulses, ft, drift_basis="none").X
    # reference: numpy lstsq (noise-free data, so the right model recovers the truth exactly)
    right_beta = np.linalg.lstsq(design.X, y, rcond=None)[0]
    wrong_beta = np.linalg.lstsq(wrong, y, rcond=None)[0]
    assert right_beta[0] - right_beta[1] == pytest.approx(-1.0, abs=1e-9)
    assert wrong_beta[0] - wrong_beta[1] > 0  # the sign of the effect flips


def test_events_past_scan_end_are_clipped_and_counted(tmp_path):
    path = write_events(tmp_path, ["2\t1\tgo", "17\t5\tgo", "19.5\t3\tstop"])
    with pytest.warns(GlmstepsWarning, match=r"2 event\(s\) extend past the end") as caught:
        clean, summary = run_validate(path)
    # worked by hand: scan end 20 s, so 17 + 5 -> 3 s and 19.5 + 3 -> 0.5 s
    np.testing.assert_allclose(clean["duration"], [1.0, 3.0, 0.5])
    assert summary["clipped"] == 2
    assert summary["conditions"]["go"]["total_duration_s"] == pytest.approx(4.0)
    assert any("data rows 2, 3" in str(w.message) for w in caught)


def test_overlapping_events_of_one_condition_warn_with_rows(tmp_path):
    # rows 1 and 3 (go) overlap; row 2 (stop) overlaps row 1 in time but is another condition
    path = write_events(tmp_path, ["2\t3\tgo", "3\t1\tstop", "4\t1\tgo", "10\t1\tgo"])
    with pytest.warns(GlmstepsWarning) as caught:
        run_validate(path)
    messages = [str(w.message) for w in caught]
    assert len(messages) == 1
    assert "condition 'go'" in messages[0] and "data rows 1 and 3" in messages[0]
    assert path.name in messages[0]


def test_no_overlap_warning_for_abutting_events(tmp_path):
    path = write_events(tmp_path, ["2\t2\tgo", "4\t2\tgo", "6\t2\tgo"])
    with warnings.catch_warnings():
        warnings.simplefilter("error", GlmstepsWarning)
        run_validate(path)


def test_find_overlaps_against_brute_force():
    # reference: numpy pairwise interval test written independently (all pairs, O(n^2))
    rng = np.random.default_rng(3)
    onset = np.sort(rng.uniform(0, 100, 40))
    duration = rng.uniform(0, 6, 40)
    starts, ends = onset[:, None], (onset + duration)[:, None]
    overlapping = (starts.T < ends) & (starts < ends.T)  # open intervals intersect
    np.fill_diagonal(overlapping, False)
    brute = {j for i, j in zip(*np.nonzero(np.triu(overlapping)))}
    found = {later for _, later in find_overlaps(onset, duration)}
    assert found == brute


def test_clip_durations_formula():
    # reference: onset + duration <= scan end, by hand
    duration, clipped = clip_durations([0.0, 8.0, 9.0], [2.0, 2.0, 5.0], 10.0)
    np.testing.assert_allclose(duration, [2.0, 2.0, 1.0])
    np.testing.assert_array_equal(clipped, [False, False, True])


# --------------------------------------------------------------------------- modulators of some conditions (issue 14)

BIDS_EVENTS = [  # a BIDS-shaped events file: response_time exists for 'flash' only, n/a elsewhere
    # reference: BIDS specification 1.9, "Task events": extra columns such as response_time, n/a where a
    # value does not apply (from memory)
    "onset\tduration\ttrial_type\tresponse_time\trating",
    "2.0\t18.0\ttap\tn/a\tn/a",
    "24.5\t2.0\tflash\t0.512\t3",
    "31.0\t0.0\thorn\tn/a\tn/a",
    "40.2\t2.0\tflash\t0.731\t4",
    "52.0\t0.0\thorn\tn/a\t2",
    "60.7\t2.0\tflash\t0.644\t5",
]


def write_bids_events(tmp_path: Path, lines: list[str] = BIDS_EVENTS) -> Path:
    path = tmp_path / "sub-01_task-beacon_run-1_events.tsv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def test_modulator_needs_values_only_on_its_own_condition(tmp_path):
    path = write_bids_events(tmp_path)
    clean, _ = validate_events(read_tsv(path), source=str(path), n_volumes=40, repetition_time_s=2.0,
                               modulators={"flash": ["response_time", "rating"]})
    raw = pd.read_csv(path, sep="\t", na_values=["n/a"], keep_default_na=False)  # reference: pandas reader
    flash = clean["condition"] == "flash"
    np.testing.assert_array_equal(clean.loc[flash, "response_time"], raw.loc[raw.trial_type == "flash", "response_time"])
    assert clean.loc[~flash, "response_time"].isna().all()
    assert list(clean.columns) == ["onset", "duration", "condition", "rating", "response_time"]
    # the horn row's rating (2) is kept as a number even though horn is not modulated by it
    assert clean.loc[clean["condition"] == "horn", "rating"].tolist()[1] == 2.0


def test_na_modulator_on_the_modulated_condition_is_one_line_error(tmp_path):
    lines = list(BIDS_EVENTS)
    lines[4] = "40.2\t2.0\tflash\tn/a\t4"  # data row 4: a flash without a response time
    path = write_bids_events(tmp_path, lines)
    with pytest.raises(EventsError) as info:
        validate_events(read_tsv(path), source=str(path), n_volumes=40, repetition_time_s=2.0,
                        modulators={"flash": ["response_time"]})
    message = str(info.value)
    assert "\n" not in message and path.name in message
    assert "data row 4 (1-based" in message and "'response_time'" in message and "'flash'" in message
    assert tsv_line_of_row(path, 4).split("\t")[3] == "n/a"
    # the same file is fine when the column modulates a condition whose rows all have it
    lines[4] = "40.2\t2.0\tflash\t0.7\t4"
    validate_events(read_tsv(write_bids_events(tmp_path, lines)), source="x", n_volumes=40, repetition_time_s=2.0,
                    modulators={"flash": ["response_time"]})


def test_design_from_bids_events_with_modulator_matches_hand_built_regressor(tmp_path):
    """validate_events -> build_design on a BIDS-shaped file: the flash modulator uses the flash rows only."""
    from glmsteps import design as gd
    from glmsteps.hrf import hrf_basis
    path = write_bids_events(tmp_path)
    clean, _ = validate_events(read_tsv(path), source=str(path), n_volumes=40, repetition_time_s=2.0,
                               modulators={"flash": ["response_time"]})
    ft = gd.frame_times(40, 2.0)
    design = gd.build_design(clean, ft, modulators={"flash": ["response_time"]}, drift_basis="none")
    kernel = hrf_basis("double_gamma", 0.1)[0][:, 0]
    # reference: Buchel et al. (1996) mean-centred parametric regressor, the 3 flash events by hand
    rt = np.array([0.512, 0.731, 0.644])
    expected = sum((r - rt.mean()) * gd.convolve_events([o], [2.0], [1.0], ft, kernel, 0.1)
                   for r, o in zip(rt, [24.5, 40.2, 60.7]))
    np.testing.assert_allclose(design.X[:, design.names.index("flash__x_response_time")], expected, atol=1e-12)


# --------------------------------------------------------------------------- repeated rows (issue 20)

def test_find_duplicate_events_pairs_first_and_repeat():
    # worked by hand: rows 2 and 4 repeat rows 0 and 1; row 3 differs in duration; n/a equals n/a only
    pairs = find_duplicate_events([1, 3, 1, 1, 3, 5, 5], [1, 2, 1, 2, 2, 0, 0], list("gsggsgg"),
                                  [False, False, False, False, False, True, False])
    assert pairs == [(0, 2), (1, 4)]


def test_duplicated_file_would_halve_every_effect(tmp_path):
    """Why repeats are an error: every row twice doubles each regressor, so each beta halves (issue 20)."""
    from glmsteps import design as gd
    rows = ["4\t2\tgo", "20\t2\tstop", "40\t2\tgo", "60\t2\tstop"]
    path = write_events(tmp_path, rows + rows)
    with pytest.raises(EventsError) as info:
        run_validate(path, n_volumes=45)
    message = str(info.value)
    assert "\n" not in message and path.name in message and "4 of 8 rows repeat" in message
    assert "data rows 1 and 5" in message and "events.duplicate_events" in message
    with pytest.warns(GlmstepsWarning) as caught:
        doubled, summary = run_validate(path, n_volumes=45, duplicate_events="keep_all")
    assert any("keep_all" in str(w.message) for w in caught)  # and the overlap warnings of the repeats
    assert summary["duplicate_rows"] == 4 and summary["n_events"] == 8
    with pytest.warns(GlmstepsWarning, match=r"data rows 5, 6, 7, 8, 1-based\) are dropped"):
        single, summary = run_validate(path, n_volumes=45, duplicate_events="keep_first")
    assert summary["n_events"] == 4 and summary["n_rows"] == 8
    pd.testing.assert_frame_equal(single, run_validate(write_events(tmp_path, rows, name="once.tsv"), n_volumes=45)[0])
    ft = gd.frame_times(45, 2.0)
    X1 = gd.build_design(single, ft, drift_basis="none").X
    X2 = gd.build_design(doubled, ft, drift_basis="none").X
    y = X1 @ np.array([1.0, -0.5, 10.0])
    # reference: numpy lstsq; doubled regressors give half the betas (worked by hand: X2 = [2 a, 2 b, 1])
    np.testing.assert_allclose(np.linalg.lstsq(X2, y, rcond=None)[0][:2], [0.5, -0.25], atol=1e-9)


def test_schema_offers_exactly_the_row_policies_the_step_knows():
    import yaml

    from glmsteps.events import DUPLICATE_POLICIES, MISSING_DURATION_POLICIES
    schema = yaml.safe_load((Path(__file__).resolve().parents[1] / "config" / "schema.yaml").read_text())
    events = schema["properties"]["events"]["properties"]
    assert tuple(events["duplicate_events"]["enum"]) == DUPLICATE_POLICIES and events["duplicate_events"]["default"] == "error"
    assert tuple(events["missing_duration"]["enum"]) == MISSING_DURATION_POLICIES
    assert events["missing_duration"]["default"] == "error"
