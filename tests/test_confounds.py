"""Tests of glmsteps.confounds: selection, 24-parameter expansion, standardisation, censoring."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from glmsteps.confounds import (ConfoundSet, backward_difference, censor_volumes, clean_confound_values,
                                expand_confounds, prepare_confounds, select_columns, spike_regressors,
                                standardise_columns)
from glmsteps.errors import ConfigError, ConfoundsError, GlmstepsWarning
from glmsteps.fileio import read_tsv

MOTION = ["trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z"]
SOURCE = "sub-01_task-demo_run-1_confounds.tsv"


def write_confounds(tmp_path: Path, table_text: str) -> Path:
    path = tmp_path / SOURCE
    path.write_text(table_text, encoding="utf-8")
    return path


def motion_table() -> pd.DataFrame:
    # a tiny hand-made table: 4 volumes x 6 motion parameters (mm / rad)
    x = np.array([[0.0, 0.1, -0.2, 0.01, 0.00, -0.02],
                  [0.2, 0.1, -0.1, 0.02, 0.01, -0.01],
                  [0.1, 0.3, 0.0, 0.00, 0.03, 0.00],
                  [0.4, 0.2, 0.2, -0.01, 0.02, 0.02]])
    return pd.DataFrame(x, columns=MOTION)


def base_settings(**overrides):
    settings = dict(columns=MOTION, derivatives=False, squares=False, demean=False, scale=False,
                    censor_column=None, censor_threshold=None, volumes_before=0, volumes_after=0,
                    drop_initial_volumes=0, max_censored_fraction=1.0)
    settings.update(overrides)
    return settings


# --------------------------------------------------------------------------- expansion

def test_24_parameter_expansion_values_and_names():
    table = motion_table()
    out = expand_confounds(table, derivatives=True, squares=True)
    # reference: Friston et al. (1996) 24-parameter motion model [x, dx, x^2, dx^2];
    # derivative by numpy.diff, written independently here (first volume 0)
    x = table.to_numpy()
    dx = np.vstack([np.zeros((1, 6)), np.diff(x, axis=0)])
    expected = np.hstack([x, dx, x * x, dx * dx])
    assert out.shape == (4, 24)
    np.testing.assert_allclose(out.to_numpy(), expected, rtol=0, atol=1e-15)
    names = MOTION + [n + "_diff" for n in MOTION] + [n + "_sq" for n in MOTION] + [n + "_diff_sq" for n in MOTION]
    assert list(out.columns) == names
    # one value checked fully by hand: trans_x volume 3: 0.4 - 0.1 = 0.3, squared 0.09
    assert out.loc[3, "trans_x_diff"] == pytest.approx(0.3)
    assert out.loc[3, "trans_x_diff_sq"] == pytest.approx(0.09)


@pytest.mark.parametrize("derivatives, squares, suffixes", [(True, False, ["", "_diff"]), (False, True, ["", "_sq"]),
                                                             (False, False, [""])])
def test_partial_expansions(derivatives, squares, suffixes):
    out = expand_confounds(motion_table(), derivatives=derivatives, squares=squares)
    assert list(out.columns) == [n + s for s in suffixes for n in MOTION]


def test_backward_difference_matches_numpy_diff():
    x = np.random.default_rng(0).normal(size=(7, 3))
    # reference: numpy.diff with a zero first row
    np.testing.assert_array_equal(backward_difference(x), np.concatenate([np.zeros((1, 3)), np.diff(x, axis=0)]))


def test_expansion_name_clash_is_an_error():
    table = pd.DataFrame({"a": [0.0, 1.0], "a_diff": [0.0, 1.0]})
    with pytest.raises(ConfoundsError, match="'a_diff'") as info:
        expand_confounds(table, derivatives=True, squares=False, source=SOURCE)
    assert str(info.value).startswith(SOURCE + ":")


# --------------------------------------------------------------------------- selection

def test_select_columns_globs_in_table_order_without_duplicates():
    table = pd.DataFrame(columns=["csf", "trans_x", "rot_x", "trans_y", "framewise_displacement", "rot_y"])
    # reference: Python fnmatch semantics (* any text, ? one character)
    chosen = select_columns(table, ["rot_*", "trans_?", "trans_x", "csf"], source=SOURCE)
    assert chosen == ["csf", "trans_x", "rot_x", "trans_y", "rot_y"]


def test_select_columns_exact_name_with_glob_characters():
    table = pd.DataFrame(columns=["comp[1]", "comp1"])
    assert select_columns(table, ["comp[1]"], source=SOURCE) == ["comp[1]", "comp1"]


def test_unmatched_pattern_lists_available_columns():
    table = pd.DataFrame(columns=["csf", "trans_x"])
    with pytest.raises(ConfoundsError) as info:
        select_columns(table, ["white_matter"], source=SOURCE)
    message = str(info.value)
    assert "\n" not in message and SOURCE in message and "'white_matter'" in message
    assert "['csf', 'trans_x']" in message


# --------------------------------------------------------------------------- NaN handling

def test_nan_in_first_row_of_diff_column_is_zeroed(tmp_path):
    path = write_confounds(tmp_path, "trans_x\ttrans_x_diff\tfd\n0.1\tn/a\tn/a\n0.3\t0.2\t0.2\n0.2\t-0.1\t0.1\n")
    out = clean_confound_values(read_tsv(path)[["trans_x", "trans_x_diff", "fd"]], source=str(path),
                                derivative_columns=["fd"])
    np.testing.assert_array_equal(out["trans_x_diff"], [0.0, 0.2, -0.1])
    np.testing.assert_array_equal(out["fd"], [0.0, 0.2, 0.1])
    assert out.dtypes.eq(np.float64).all()


@pytest.mark.parametrize("text, row, column, found", [
    ("a\tb_diff\n0.1\t0\n0.2\tn/a\n", 2, "b_diff", "n/a"),           # NaN after the first row of a derivative
    ("a\tb_diff\nn/a\t0\n0.2\t0.1\n", 1, "a", "n/a"),               # NaN in the first row of a plain column
    ("a\tb_diff\n0.1\t0\n0.2\t0.1\n0.3\thigh\n", 3, "b_diff", "high"),  # text in a numeric column
])
def test_bad_values_name_column_and_row(tmp_path, text, row, column, found):
    path = write_confounds(tmp_path, text)
    with pytest.raises(ConfoundsError) as info:
        clean_confound_values(read_tsv(path), source=str(path))
    message = str(info.value)
    assert "\n" not in message and path.name in message
    assert f"'{column}'" in message and f"data row {row} (1-based" in message and found in message
    # the named row is the file line holding that value (header line not counted)
    assert found in path.read_text().splitlines()[row].split("\t")


# --------------------------------------------------------------------------- standardisation

def test_demean_and_scale_use_kept_volumes_only():
    rng = np.random.default_rng(1)
    x = rng.normal(3.0, 2.0, size=(12, 3))
    x[:2] += 50.0  # non-steady-state volumes, dropped: must not enter the statistics
    table = pd.DataFrame(x, columns=["a", "b", "c"])
    kept = np.arange(12) >= 2
    out = standardise_columns(table, kept, demean=True, scale=True).to_numpy()
    # reference: numpy mean and sample standard deviation (ddof=1) over the kept rows
    expected = (x - x[kept].mean(axis=0)) / x[kept].std(axis=0, ddof=1)
    np.testing.assert_allclose(out, expected, rtol=1e-12)
    np.testing.assert_allclose(out[kept].mean(axis=0), 0.0, atol=1e-12)
    np.testing.assert_allclose(out[kept].std(axis=0, ddof=1), 1.0, rtol=1e-12)


def test_constant_column_is_not_scaled_and_warns():
    table = pd.DataFrame({"flat": [5.0, 2.0, 2.0, 2.0], "b": [1.0, 2.0, 4.0, 8.0]})
    with pytest.warns(GlmstepsWarning, match="'flat' is constant"):
        out = standardise_columns(table, np.array([False, True, True, True]), demean=False, scale=True)
    np.testing.assert_array_equal(out["flat"], table["flat"])


# --------------------------------------------------------------------------- censoring

def test_censor_volumes_hand_made_trace():
    # reference: Power et al. (2012): censor FD > 0.5 mm with 1 volume before and 2 after (from memory)
    fd_mm = np.array([0.1, 0.7, 0.1, 0.1, 0.2, 0.5, 0.9, 0.1, 0.1, 0.1, 0.1])
    censored = censor_volumes(fd_mm, 0.5, volumes_before=1, volumes_after=2, n_dropped=0)
    # worked by hand: volume 1 -> 0..3; volume 6 -> 5..8; volume 5 equals the threshold (not above)
    expected = np.array([1, 1, 1, 1, 0, 1, 1, 1, 1, 0, 0], dtype=bool)
    np.testing.assert_array_equal(censored, expected)


def test_dropped_volumes_are_never_censored_and_do_not_trigger():
    fd_mm = np.array([2.0, 0.1, 0.1, 0.1, 0.8, 0.1, 0.1])
    censored = censor_volumes(fd_mm, 0.5, volumes_before=3, volumes_after=1, n_dropped=2)
    # worked by hand: volume 0 is dropped (ignored); volume 4 -> 1..5, minus dropped 0..1 -> 2..5
    np.testing.assert_array_equal(censored, [0, 0, 1, 1, 1, 1, 0])


def test_censor_volumes_against_convolution():
    # reference: the same rule written as a numpy convolution of the trigger indicator with a box
    rng = np.random.default_rng(7)
    values = rng.exponential(0.2, size=300)
    before, after, dropped = 2, 3, 5
    trigger = (values > 0.5) & (np.arange(300) >= dropped)
    box = np.ones(before + after + 1)
    spread = np.convolve(trigger.astype(float), box)[before: before + 300] > 0
    spread[:dropped] = False
    np.testing.assert_array_equal(censor_volumes(values, 0.5, volumes_before=before, volumes_after=after,
                                                 n_dropped=dropped), spread)


def test_spike_regressors_are_one_hot():
    censored = np.zeros(12, dtype=bool)
    censored[[3, 4, 10]] = True
    spikes = spike_regressors(censored)
    assert list(spikes.columns) == ["spike_0003", "spike_0004", "spike_0010"]
    np.testing.assert_array_equal(spikes.to_numpy(), np.eye(12)[:, [3, 4, 10]])  # reference: numpy identity


def test_spike_regressors_equal_deleting_volumes():
    # reference: statsmodels OLS on the volumes kept gives the same betas as the fit with spike columns
    rng = np.random.default_rng(11)
    n = 40
    X = np.column_stack([np.ones(n), rng.normal(size=n), rng.normal(size=n)])
    y = X @ [1.0, 2.0, -0.5] + rng.normal(size=n)
    censored = np.zeros(n, dtype=bool)
    censored[[5, 6, 7, 30]] = True
    y[censored] += 25.0  # corrupted volumes
    with_spikes = np.linalg.lstsq(np.hstack([X, spike_regressors(censored).to_numpy()]), y, rcond=None)[0]
    deleted = sm.OLS(y[~censored], X[~censored]).fit().params
    np.testing.assert_allclose(with_spikes[:3], deleted, rtol=1e-10)


# --------------------------------------------------------------------------- prepare_confounds

def censor_table() -> pd.DataFrame:
    table = motion_table()
    table = pd.concat([table, table * 0.5, table * -1.0], ignore_index=True)  # 12 volumes
    fd = [np.nan, 0.1, 0.1, 0.9, 0.1, 0.1, 0.1, 0.1, 0.1, 0.7, 0.1, 0.1]
    return table.assign(framewise_displacement=fd)


def test_prepare_confounds_full_pipeline():
    table = censor_table()
    result = prepare_confounds(table, source=SOURCE, **base_settings(
        columns=["trans_*", "rot_*"], derivatives=True, squares=True, demean=True,
        censor_column="framewise_displacement", censor_threshold=0.5, volumes_before=1, volumes_after=1, drop_initial_volumes=1, max_censored_fraction=0.8))
    assert isinstance(result, ConfoundSet)
    # worked by hand: FD 0.9 at volume 3 -> 2..4; 0.7 at volume 9 -> 8..10
    np.testing.assert_array_equal(np.flatnonzero(result.censored), [2, 3, 4, 8, 9, 10])
    assert result.censored_fraction == pytest.approx(6 / 11)  # over the 11 kept volumes
    assert not result.excluded and result.exclusion_reason == ""
    assert list(result.regressors.columns[-6:]) == ["spike_0002", "spike_0003", "spike_0004", "spike_0008",
                                                    "spike_0009", "spike_0010"]
    assert result.regressors.shape == (12, 24 + 6)
    assert result.selected_columns == tuple(MOTION)
    # reference: numpy mean over the kept volumes (1..11) is zero after centring
    np.testing.assert_allclose(result.regressors.iloc[1:, :24].mean(axis=0), 0.0, atol=1e-12)


def test_run_is_excluded_with_warning_when_too_much_is_censored():
    with pytest.warns(GlmstepsWarning, match="run excluded") as caught:
        result = prepare_confounds(censor_table(), source=SOURCE, **base_settings(
            censor_column="framewise_displacement", censor_threshold=0.5, volumes_before=1, volumes_after=1,
            max_censored_fraction=0.25))
    assert result.excluded
    assert "6 of 12" in result.exclusion_reason
    assert SOURCE in str(caught[0].message)


def test_no_censoring_without_censor_column():
    result = prepare_confounds(censor_table(), source=SOURCE, **base_settings())
    assert not result.censored.any() and result.censored_fraction == 0.0
    assert list(result.regressors.columns) == MOTION


def test_unknown_censor_column_lists_columns():
    with pytest.raises(ConfoundsError) as info:
        prepare_confounds(censor_table(), source=SOURCE, **base_settings(censor_column="fd", censor_threshold=0.5))
    message = str(info.value)
    assert "\n" not in message and SOURCE in message and "'fd'" in message and "framewise_displacement" in message


@pytest.mark.parametrize("overrides, error", [
    ({"derivatives": "yes"}, ConfigError),
    ({"columns": "trans_x"}, ConfigError),
    ({"censor_column": "framewise_displacement", "censor_threshold": None}, ConfigError),
    ({"censor_column": "framewise_displacement", "censor_threshold": 0.5, "volumes_after": -1}, ConfigError),
    ({"drop_initial_volumes": -2}, ConfigError),
    ({"drop_initial_volumes": 12}, ConfoundsError),
    ({"max_censored_fraction": 1.5}, ConfigError),
])
def test_settings_are_validated_up_front(overrides, error):
    with pytest.raises(error) as info:
        prepare_confounds(censor_table(), source=SOURCE, **base_settings(**overrides))
    assert "\n" not in str(info.value)


def test_no_warning_on_a_clean_run():
    with warnings.catch_warnings():
        warnings.simplefilter("error", GlmstepsWarning)
        prepare_confounds(censor_table(), source=SOURCE, **base_settings(demean=True, scale=True))


# --------------------------------------------------------------------------- row count, units, motion summary

def test_row_count_must_match_the_bold_volumes():
    from glmsteps.confounds import check_row_count
    table = pd.DataFrame({"a": np.zeros(119)})
    with pytest.raises(ConfoundsError) as info:
        check_row_count(table, 120, source=SOURCE, bold="sub-01_bold.nii.gz")
    message = str(info.value)
    assert "\n" not in message and message.startswith(SOURCE) and "119 data rows" in message
    assert "120 volumes" in message and "inputs.confounds" in message
    check_row_count(table, 119, source=SOURCE, bold="b")


def test_motion_summary_against_numpy_by_hand():
    from glmsteps.confounds import column_unit, motion_summary
    rng = np.random.default_rng(8)
    traces = pd.DataFrame({"move_x_mm": rng.normal(0, 0.3, 40), "turn_x_rad": rng.normal(0, 0.01, 40),
                           "csf": rng.normal(500, 5, 40)})
    traces.loc[1, "move_x_mm"] = 9.0  # a large value in a dropped volume is not summarised
    fd = np.abs(rng.normal(0.2, 0.1, 40))
    defined = np.ones(40, dtype=bool)
    defined[0] = False  # n/a first row of a displacement measure
    fd[0] = 0.0
    got = motion_summary(traces, n_dropped=3, censor_values=fd, censor_column="fd", censor_defined=defined,
                         censor_threshold=0.3)
    assert [column_unit(c) for c in traces.columns] == ["mm", "rad", None]
    assert set(got["columns"]) == {"move_x_mm", "turn_x_rad"} and got["volumes_summarised"] == 37
    # reference: numpy, written out over volumes 3..39
    for name, unit in (("move_x_mm", "mm"), ("turn_x_rad", "rad")):
        kept = np.abs(traces[name].to_numpy()[3:])
        assert got["columns"][name] == {"unit": unit, "max_abs": pytest.approx(kept.max(), rel=1e-15),
                                        "max_abs_volume": 3 + int(np.argmax(kept))}
    assert got["censor"]["mean"] == pytest.approx(fd[3:].mean(), rel=1e-14)
    assert got["censor"]["max"] == fd[3:].max() and got["censor"]["max_volume"] == 3 + int(np.argmax(fd[3:]))
    assert got["censor"]["n_above_threshold"] == int((fd[3:] > 0.3).sum())
    # without dropped volumes the undefined first row is still left out of the mean
    got0 = motion_summary(traces, n_dropped=0, censor_values=fd, censor_column="fd", censor_defined=defined)
    assert got0["censor"]["mean"] == pytest.approx(fd[1:].mean(), rel=1e-14)
    assert got0["censor"]["n_above_threshold"] is None
