"""Tests of glmsteps.precheck: contrast keys checked against the events files when the workflow starts."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from glmsteps import design as gd
from glmsteps import names
from glmsteps.confounds import expand_confounds, spike_regressors
from glmsteps.errors import ContrastError, EventsError
from glmsteps.events import validate_events
from glmsteps.fileio import read_tsv
from glmsteps.hrf import HRF_MODELS, hrf_basis
from glmsteps.precheck import (MODEL_SUFFIXES, check_conditions_present, check_config_contrasts,
                               check_contrast_keys, read_conditions)


def write(path: Path, rows: list[str], header: str = "onset\tduration\ttrial_type") -> str:
    path.write_text("\n".join([header, *rows]) + "\n", encoding="utf-8")
    return str(path)


@pytest.fixture
def study(tmp_path):
    """Three runs: run 2 lacks 'horn'; one events file of the discovered runs does not exist."""
    a = write(tmp_path / "a_events.tsv", ["2\t18\ttap", "30\t2\tflash", "40\t0\thorn"])
    b = write(tmp_path / "b_events.tsv", ["2\t18\ttap", "30\t2\tflash"])
    c = write(tmp_path / "c_events.tsv", ["4\t18\ttap", "31\t2\tflash", "44\t0\thorn", "50\tn/a\tn/a"])
    return [a, b, c, str(tmp_path / "missing_events.tsv")]


def test_read_conditions_matches_the_events_step(tmp_path):
    # reference: pandas read_csv with BIDS n/a, independent of the fast reader
    rows = ["1\t1\tgo", "3\t1\tNA", "5\t1\tn/a", "7\t1\tnull", "9\t1\t"]
    path = write(tmp_path / "e.tsv", rows)
    raw = pd.read_csv(path, sep="\t", na_values=["n/a", ""], keep_default_na=False)
    assert read_conditions(path, "trial_type") == set(raw["trial_type"].dropna())
    # numeric condition codes: written as the events step writes them (1.0 -> '1')
    numeric = write(tmp_path / "n.tsv", ["1\t1\t1.0", "3\t1\t2", "5\t1\t2.5"])
    clean, _ = validate_events(read_tsv(numeric), source=numeric, n_volumes=10, repetition_time_s=2.0)
    assert read_conditions(numeric, "trial_type") == set(clean["condition"]) == {"1", "2", "2.5"}
    with pytest.raises(EventsError) as info:
        read_conditions(path, "condition")
    assert "\n" not in str(info.value) and "e.tsv" in str(info.value) and "events.condition_column" in str(info.value)


def test_unknown_key_is_one_line_naming_contrast_key_and_conditions(study):
    with pytest.raises(ContrastError) as info:
        check_contrast_keys(study, "trial_type", {"typo": {"weights": {"tapp": 1}}})
    message = str(info.value)
    assert "\n" not in message and "contrast 'typo'" in message and "key 'tapp'" in message
    assert "['flash', 'horn', 'tap']" in message and "3 events files" in message


def test_runs_lacking_a_condition_are_returned(study):
    result = check_contrast_keys(study, "trial_type", {"horn": {"weights": {"horn": 1}},
                                                       "tap": {"weights": {"tap": 1, "intercept": 0.5}}})
    assert result == {"horn": {study[1]: ["horn"]}, "tap": {}}


@pytest.mark.parametrize(("hrf", "key", "ok"), [
    ("double_gamma", "tap__latency", False), ("double_gamma_latency", "tap__latency", True),
    ("double_gamma_latency", "tap__width", False), ("double_gamma_latency_width", "tap__width", True),
    ("fir", "tap__fir03", True), ("fir", "tap__fir04", False), ("double_gamma", "tap__derivative", False),
    ("double_gamma", "tap__x_rating", True), ("double_gamma", "flash__x_rating", False),
    ("double_gamma", "slow_03", True), ("double_gamma", "spike_0046", True), ("double_gamma", "move_x_mm", True),
    ("double_gamma", "move_x_mm_diff", True), ("double_gamma", "move_x_mm_sq", False),
    ("double_gamma", "drift_01", False), ("double_gamma", "rest", False),
])
def test_design_column_keys(study, hrf, key, ok):
    contrasts = {"c": {"weights": {key: 1}}}
    kwargs = dict(hrf=hrf, fir_bins=4, modulators={"tap": ["rating"]}, confound_columns=["move_x_mm", "turn_*"],
                  derivatives=True, squares=False)
    if ok:
        check_contrast_keys(study, "trial_type", contrasts, **kwargs)
    else:
        with pytest.raises(ContrastError, match=f"key '{key}'") as info:
            check_contrast_keys(study, "trial_type", contrasts, **kwargs)
        if key == "tap__derivative":
            assert "'tap__latency'" in str(info.value)
        if key == "tap__latency":
            assert "design.hrf" in str(info.value)


def test_all_keys_only_in_f_rows_and_conditions_list(study):
    check_contrast_keys(study, "trial_type", {"f": {"rows": [{"tap__all": 1}, {"flash": 1}]}})
    with pytest.raises(ContrastError, match="F contrast"):
        check_contrast_keys(study, "trial_type", {"t": {"weights": {"tap__all": 1}}})
    with pytest.raises(ContrastError, match="events.conditions does not list"):
        check_contrast_keys(study, "trial_type", {"t": {"weights": {"horn": 1}}}, conditions=["tap", "flash"])


def test_every_column_build_design_makes_is_an_accepted_key(tmp_path):
    """The checker knows the design's naming: every column of real designs is accepted, typos are not."""
    path = write(tmp_path / "e.tsv", ["2\t18\ttap\t3", "30\t2\tflash\t2", "40\t0\thorn\t5", "60\t2\tflash\t4"],
                 header="onset\tduration\ttrial_type\trating")
    ft = gd.frame_times(60, 2.0)
    rng = np.random.default_rng(0)
    motion = pd.DataFrame(rng.normal(size=(60, 2)), columns=["move_x_mm", "turn_x_rad"])
    censored = np.zeros(60, dtype=bool)
    censored[[12, 40]] = True
    confounds = pd.concat([expand_confounds(motion, derivatives=True, squares=True), spike_regressors(censored)],
                          axis=1)
    events = validate_events(read_tsv(path), source=path, n_volumes=60, repetition_time_s=2.0,
                             modulators={"flash": ["rating"]})[0]
    for hrf in HRF_MODELS:
        fir = {"fir_bins": 5, "fir_bin_width_s": 2.0} if hrf == "fir" else {}
        mods = {} if hrf == "fir" else {"flash": ["rating"]}
        for drift in ("cosine", "legendre"):
            design = gd.build_design(events, ft, hrf=hrf, drift_basis=drift, confounds=confounds, modulators=mods,
                                     **fir)
            contrasts = {f"c{j}": {"weights": {name: 1}} for j, name in enumerate(design.names)}
            check_contrast_keys([path], "trial_type", contrasts, hrf=hrf, fir_bins=5, modulators=mods,
                                confound_columns=["move_*", "turn_*"], derivatives=True, squares=True)
        # the basis words the checker expects are those hrf_basis labels the columns with
        labels = hrf_basis(hrf, 0.1, fir_bins=5, fir_bin_width_s=2.0)[1]
        if hrf != "fir":
            assert tuple(labels[1:]) == MODEL_SUFFIXES[hrf]
    with pytest.raises(ContrastError):
        check_contrast_keys([path], "trial_type", {"c": {"weights": {"flash__rating": 1}}},
                            modulators={"flash": ["rating"]})


def test_config_form_and_no_events_files(study):
    config = {"events": {"condition_column": "trial_type", "conditions": [], "modulators": {}},
              "design": {"hrf": "double_gamma", "fir_bins": 10},
              "confounds": {"columns": [], "derivatives": False, "squares": False},
              "contrasts": {"tap": {"weights": {"tap": 1}}}}
    assert check_config_contrasts(config, study) == {"tap": {}}
    assert check_contrast_keys([study[-1]], "trial_type", {"x": {"weights": {"anything": 1}}}) == {}


def test_names_module_is_what_the_library_writes():
    ft = gd.frame_times(40, 2.0)
    events = pd.DataFrame({"onset": [4.0, 30.0], "duration": [2.0, 2.0], "condition": ["go", "go"], "rt": [1.0, 2.0]})
    design = gd.build_design(events, ft, hrf="double_gamma_latency_width", modulators={"go": ["rt"]})
    assert design.names[:4] == ("go", f"go{names.BASIS_SEPARATOR}{names.LATENCY_BASIS}",
                                f"go{names.BASIS_SEPARATOR}{names.WIDTH_BASIS}", f"go{names.MODULATOR_INFIX}rt")
    assert design.names[-1] == names.INTERCEPT and design.names[-2].startswith(names.SLOW_PREFIX)


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
