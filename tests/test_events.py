"""Tests of glmsteps.events: events-table validation and the per-contrast condition check.

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
from glmsteps.events import check_conditions_present, clip_durations, find_overlaps, validate_events
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
        clean, summary = run_validate(path, modulator_columns=["rt"])

    raw = pd.read_csv(path, sep="\t")  # reference: pandas' own TSV reader, independent of glmsteps
    expected = raw.sort_values("onset", kind="stable").reset_index(drop=True)
    assert list(clean.columns) == ["onset", "duration", "condition", "rt"]
    np.testing.assert_array_equal(clean["onset"], expected["onset"])
    np.testing.assert_array_equal(clean["duration"], expected["duration"])
    np.testing.assert_array_equal(clean["rt"], expected["rt"])
    assert list(clean["condition"]) == list(expected["trial_type"])
    assert clean["onset"].dtype == np.float64 and clean["rt"].dtype == np.float64

    grouped = raw.groupby("trial_type")["duration"].agg(["count", "sum"])  # reference: pandas groupby
    assert summary["n_events"] == len(raw)
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
    "missing modulator column": ("onset\tduration\ttrial_type", ["1\t1\tgo"], {"modulator_columns": ["rt"]},
                                 None, "rt", ["onset", "duration", "trial_type"]),
    "non-numeric modulator": ("onset\tduration\ttrial_type\trt", ["1\t1\tgo\t0.4", "3\t1\tgo\tslow"],
                              {"modulator_columns": ["rt"]}, (2, "slow"), "rt", ["'slow'"]),
    "n/a modulator": ("onset\tduration\ttrial_type\trt", ["1\t1\tgo\tn/a", "3\t1\tgo\t0.5"],
                      {"modulator_columns": ["rt"]}, (1, "n/a"), "rt", ["n/a"]),
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
                                    {"modulator_columns": "rt"}, {"modulator_columns": ["duration"]},
                                    {"modulator_columns": ["rt", "rt"]}])
def test_invalid_settings_are_config_errors(tmp_path, kwargs):
    path = write_events(tmp_path, ["1\t1\tgo\t0.3"], header="onset\tduration\ttrial_type\trt")
    with pytest.raises(ConfigError) as info:
        run_validate(path, **kwargs)
    assert "\n" not in str(info.value)


# --------------------------------------------------------------------------- warnings

def test_na_duration_is_an_impulse_with_warning(tmp_path):
    # reference: BIDS specification, "Task events" (duration may be n/a; an impulse has duration 0)
    path = write_events(tmp_path, ["1\t1\tgo", "3\tn/a\tgo", "5\tn/a\tstop"])
    with pytest.warns(GlmstepsWarning) as caught:
        clean, _ = run_validate(path)
    np.testing.assert_array_equal(clean["duration"], [1.0, 0.0, 0.0])
    text = " ".join(str(w.message) for w in caught)
    assert "data rows 2, 3" in text and path.name in text and "'duration'" in text


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


# --------------------------------------------------------------------------- conditions per contrast

def test_check_conditions_present_lists_runs_lacking_a_condition():
    by_run = {"run-1": {"go", "stop"}, "run-2": {"go"}, "run-3": {"go", "stop", "rest"}}
    needed = {"go_minus_stop": {"go", "stop"}, "go": {"go"}}
    result = check_conditions_present(by_run, needed)
    assert result == {"go_minus_stop": {"run-2": ["stop"]}, "go": {}}


def test_check_conditions_present_errors_when_no_run_has_it():
    by_run = {"run-1": {"go"}, "run-2": {"go", "stop"}}
    with pytest.raises(EventsError) as info:
        check_conditions_present(by_run, {"switch_cost": {"go", "switch"}})
    message = str(info.value)
    assert "\n" not in message
    assert "'switch_cost'" in message and "'switch'" in message and "['go', 'stop']" in message
