"""Precise reruns: after each edit, Snakemake's dry run plans exactly the affected jobs (issue 7).

Each test edits the config (or one input file) of the finished toy study and asserts the
exact set of (rule, key wildcards) the dry run would execute.
"""

from __future__ import annotations

import copy
import os

import pytest

from workflow_helpers import planned_jobs

pytestmark = [pytest.mark.workflow, pytest.mark.slow]

RUN_LEVEL = {"validate_events", "select_confounds", "build_design", "fit"}


def _plan(ws, config=None):
    proc = ws.snakemake("--dry-run", "--cores", "2", config=config)
    jobs = planned_jobs(proc.stdout)
    return [(rule, wc) for rule, wc in jobs if rule != "all"]


def _rules(jobs):
    return {rule for rule, _ in jobs}


def test_finished_study_plans_nothing(toy_results):
    assert _plan(toy_results) == []


def _reorder(value):
    """The same config with every mapping's keys in reverse order."""
    if isinstance(value, dict):
        return {k: _reorder(value[k]) for k in reversed(list(value))}
    return value


def test_reordering_config_keys_plans_nothing(toy_results):
    assert _plan(toy_results, _reorder(copy.deepcopy(toy_results.config))) == []


def test_fit_threads_rerun_nothing(toy_results):
    # threads change how fast a fit runs, never its results (tests/test_jobs_fit.py), so no rerun
    config = copy.deepcopy(toy_results.config)
    config.setdefault("fit", {})["threads"] = 2
    assert _plan(toy_results, config) == []


def test_adding_a_contrast_runs_only_its_jobs(toy_results):
    config = copy.deepcopy(toy_results.config)
    config["contrasts"]["tap_minus_flash"] = {"weights": {"tap": 1, "flash": -1}}
    jobs = _plan(toy_results, config)
    assert _rules(jobs) == {"contrast_t", "combine_runs", "threshold_subject", "index", "report"}
    for rule, wc in jobs:
        if rule not in ("index", "report"):
            assert wc.get("tcon", wc.get("contrast")) == "tap_minus_flash", (rule, wc)
    assert sum(rule == "contrast_t" for rule, _ in jobs) == 24


def test_changing_one_contrast_reruns_only_its_chain(toy_results):
    config = copy.deepcopy(toy_results.config)
    config["contrasts"]["flash_minus_horn"]["weights"] = {"flash": 2, "horn": -2}
    jobs = _plan(toy_results, config)
    assert _rules(jobs) == {"contrast_t", "combine_runs", "threshold_subject", "group_model",
                            "group_permutation", "threshold_group", "index", "report"}
    for rule, wc in jobs:
        if rule not in ("index", "report"):
            assert wc.get("tcon", wc.get("contrast")) == "flash_minus_horn", (rule, wc)


def test_changing_the_hrf_refits_but_keeps_events_and_confounds(toy_results):
    config = copy.deepcopy(toy_results.config)
    config["design"]["hrf"] = "double_gamma_latency"
    rules = _rules(_plan(toy_results, config))
    assert {"build_design", "fit", "contrast_t", "contrast_f", "combine_runs", "group_model"} <= rules
    assert not rules & {"validate_events", "select_confounds"}


def test_changing_the_drift_refits_but_keeps_events_and_confounds(toy_results):
    config = copy.deepcopy(toy_results.config)
    config["design"]["drift"]["cutoff_s"] = 100
    rules = _rules(_plan(toy_results, config))
    assert {"build_design", "fit", "contrast_t", "contrast_f"} <= rules
    assert not rules & {"validate_events", "select_confounds"}


def test_changing_confounds_keeps_events(toy_results):
    config = copy.deepcopy(toy_results.config)
    config["confounds"]["squares"] = True
    rules = _rules(_plan(toy_results, config))
    assert {"select_confounds", "build_design", "fit", "contrast_t", "contrast_f"} <= rules
    assert "validate_events" not in rules


def test_editing_one_events_file_reruns_that_subject_and_the_group(toy_results):
    events = next(toy_results.data.glob("sub-03/func/*run-1_events.tsv"))
    original = events.read_bytes()
    stat = events.stat()
    try:
        events.write_bytes(original.replace(b"18.0\ttap", b"17.5\ttap"))
        jobs = _plan(toy_results)
    finally:
        events.write_bytes(original)
        os.utime(events, ns=(stat.st_atime_ns, stat.st_mtime_ns))
    subjects = {wc["subject"] for rule, wc in jobs if "subject" in wc}
    assert subjects == {"03"}
    runs = {wc["run_id"] for rule, wc in jobs if "run_id" in wc}
    assert runs == {"task-beacon_run-1"}
    assert {"validate_events", "build_design", "fit", "contrast_t", "combine_runs", "group_model",
            "group_permutation", "threshold_group", "index", "report"} <= _rules(jobs)
    assert "select_confounds" not in _rules(jobs)
    assert _plan(toy_results) == []  # restored


def test_changing_a_group_model_reruns_only_its_jobs(toy_results):
    config = copy.deepcopy(toy_results.config)
    config["group_models"]["everyone"]["estimation"] = "mixed_dl"
    assert _rules(_plan(toy_results, config)) == {"group_model", "group_permutation", "threshold_group", "index",
                                                  "report"}


def test_changing_permutation_settings_reruns_only_permutations(toy_results):
    config = copy.deepcopy(toy_results.config)
    config["group_models"]["everyone"]["permutation"]["n_permutations"] = 200
    assert _rules(_plan(toy_results, config)) == {"group_permutation", "index", "report"}


def test_changing_a_threshold_reruns_only_its_jobs(toy_results):
    config = copy.deepcopy(toy_results.config)
    config["thresholds"]["subject"]["fdr05"]["q"] = 0.01
    jobs = _plan(toy_results, config)
    # the report shows subject-level thresholded maps, so it reruns with them
    assert _rules(jobs) == {"threshold_subject", "report"}
    assert sum(rule == "threshold_subject" for rule, _ in jobs) == 12 * 5   # 4 t and 1 F contrast


def test_adding_a_run_threshold_runs_only_its_jobs(toy_results):
    """The toy config thresholds no run-level map; a new run-level setting adds only its own jobs."""
    config = copy.deepcopy(toy_results.config)
    config["thresholds"]["run"] = {"fdr05": {"method": "fdr", "q": 0.05}}
    jobs = _plan(toy_results, config)
    # the report shows no run-level threshold, so it does not rerun either
    assert _rules(jobs) == {"threshold_run"}
    assert len(jobs) == 24 * 5
