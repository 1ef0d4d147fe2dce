"""The workflow's plan (glmsteps/workflow_plan.py) without Snakemake: params, paths, targets.

The config is the repository's toy config validated against config/schema.yaml with its
defaults filled in (jsonschema, as Snakemake's ``validate(..., set_default=True)`` does), and
the runs are made up, so every test runs in milliseconds. The workflow tests
(tests/test_dag.py) check the same helpers through Snakemake's dry runs.
"""

from __future__ import annotations

import copy
from pathlib import Path

import jsonschema
import pytest
import yaml

from glmsteps import workflow_plan as plan
from glmsteps.bids import RunKey
from glmsteps.errors import ConfigError

REPO = Path(__file__).resolve().parents[1]


def _with_defaults(config: dict) -> dict:
    """``config`` validated against the schema, defaults filled in (jsonschema's documented recipe)."""
    schema = yaml.safe_load((REPO / "config" / "schema.yaml").read_text())
    base = jsonschema.Draft7Validator

    def set_defaults(validator, properties, instance, schema):
        if isinstance(instance, dict):
            for name, sub in properties.items():
                if isinstance(sub, dict) and "default" in sub:
                    instance.setdefault(name, copy.deepcopy(sub["default"]))
        yield from base.VALIDATORS["properties"](validator, properties, instance, schema)

    filling = jsonschema.validators.extend(base, {"properties": set_defaults})
    config = copy.deepcopy(config)
    filling(schema).validate(config)
    return config


@pytest.fixture(scope="module")
def toy_config() -> dict:
    return _with_defaults(yaml.safe_load((REPO / "config" / "config.yaml").read_text()))


RUNS = (RunKey("02", "beacon", "1"), RunKey("01", "beacon", "2"), RunKey("01", "beacon", "1"))


def _reversed_keys(value):
    if isinstance(value, dict):
        return {k: _reversed_keys(value[k]) for k in reversed(list(value))}
    return value


def _every_params(config: dict) -> dict[str, object]:
    out: dict[str, object] = {"events": plan.events_params(config), "confounds": plan.confounds_params(config),
                              "design": plan.design_params(config), "fit": plan.fit_params(config),
                              "report": plan.report_params(config)}
    for name in config["contrasts"]:
        out[f"contrast {name}"] = plan.contrast_params(config, name)
    for level, settings in config["thresholds"].items():
        for name in settings:
            out[f"threshold {level} {name}"] = plan.threshold_params(config, level, name)
    for model, spec in config["group_models"].items():
        for gcon in spec["group_contrasts"]:
            out[f"group {model} {gcon}"] = plan.group_model_params(config, model, gcon)
            out[f"permutation {model} {gcon}"] = plan.group_permutation_params(config, model, gcon)
    return out


def test_params_text_does_not_depend_on_the_config_key_order(toy_config):
    # Snakemake compares params as text (repr), so reordering the config must give the same text
    before = {k: repr(v) for k, v in _every_params(toy_config).items()}
    after = {k: repr(v) for k, v in _every_params(_reversed_keys(copy.deepcopy(toy_config))).items()}
    assert before == after
    assert all(list(v) == sorted(v) for v in _every_params(toy_config).values())


def test_threshold_params_hold_only_the_keys_of_their_method(toy_config):
    config = copy.deepcopy(toy_config)
    config["thresholds"]["run"] = {"loose": {"method": "uncorrected", "p": 0.01}}
    config = _with_defaults(config)
    # config/schema.yaml: fdr uses q, uncorrected p and min_cluster_voxels; all four the cluster-table keys
    common = {"name", "method", "connectivity", "tail", "subpeaks", "subpeak_spacing_mm"}
    assert set(plan.threshold_params(config, "subject", "fdr05")) == common | {"q"}
    loose = plan.threshold_params(config, "run", "loose")
    assert set(loose) == common | {"p", "min_cluster_voxels"}
    assert loose["p"] == 0.01 and loose["min_cluster_voxels"] == 1  # given, and the schema's default


def test_a_contrast_s_params_do_not_change_when_another_contrast_is_added(toy_config):
    config = copy.deepcopy(toy_config)
    config["contrasts"]["tap_minus_horn"] = {"weights": {"tap": 1, "horn": -1}}
    for name in toy_config["contrasts"]:
        assert plan.contrast_params(config, name) == plan.contrast_params(toy_config, name)
    assert set(plan.contrast_params(config, "tap")) == {"name", "definition", "tail", "skip_nonestimable"}


def test_group_params_take_the_design_s_columns_only(toy_config):
    config = copy.deepcopy(toy_config)
    config["group_models"]["sites"] = {"design": "two_sample", "group_contrasts": {"a_minus_b": {"a": 1, "b": -1}}}
    config = _with_defaults(config)
    one = plan.group_model_params(config, "everyone", "mean")
    two = plan.group_model_params(config, "sites", "a_minus_b")
    assert "group_column" not in one and "pair_column" not in one
    assert two["group_column"] == "group" and "pair_column" not in two  # the schema's default column
    assert two["contrast"] == {"name": "a_minus_b", "weights": {"a": 1, "b": -1}}
    perm = plan.group_permutation_params(config, "everyone", "mean")
    assert {k: v for k, v in perm.items() if k != "permutation"} == one
    assert perm["permutation"]["n_permutations"] == 500


def test_targets_and_inputs_of_a_small_study(toy_config):
    p = plan.WorkflowPlan(toy_config, RUNS)
    assert p.subjects == ["01", "02"]
    assert p.runs_of("01") == ["task-beacon_run-2", "task-beacon_run-1"]  # discovery order kept
    assert p.subject_fits("01") == ["results/sub-01/task-beacon_run-2/fit.h5", "results/sub-01/task-beacon_run-1/fit.h5"]
    assert p.subject_underlay("02") == "results/sub-02/task-beacon_run-1/mean.nii.gz"
    assert p.group_underlay() == "results/sub-01/task-beacon_run-2/mean.nii.gz"
    n_con, n_t = len(toy_config["contrasts"]), len(p.t_contrasts)
    # per run: two figures, the fit and one z map per contrast (no run thresholds in the toy config)
    assert len(p.run_targets()) == len(RUNS) * (3 + n_con)
    assert len(p.subject_targets()) == 2 * n_con * 2          # z and one threshold (fdr05) per contrast
    # group: 4 contrasts x 1 group contrast x (z, p_fwe, threshold) ; tfce is off by default
    assert len(p.group_targets()) == 4 * 3
    targets = p.all_targets()
    assert len(targets) == len(set(targets)) and targets[-2:] == ["results/index.tsv", "results/report/index.html"]
    # index: 5 maps a t contrast, 3 an F contrast, at run and subject level; 7 a permuted group map
    n_f = n_con - n_t
    assert len(p.indexed_maps()) == (len(RUNS) + 2) * (5 * n_t + 3 * n_f) + 4 * 7
    assert p.raw_file("events", "01", "task-beacon_run-2").endswith("sub-01_task-beacon_run-2_events.tsv")


def test_without_run_maps_no_run_contrast_is_a_target(toy_config):
    config = copy.deepcopy(toy_config)
    config["contrast_options"]["run_maps"] = False
    config["thresholds"]["run"] = {"fdr05": {"method": "fdr", "q": 0.05}}
    p = plan.WorkflowPlan(config, RUNS)
    assert len(p.run_targets()) == 3 * len(RUNS)
    assert not any("/task-" in m for m in p.indexed_maps())


def test_the_report_reads_subject_and_group_thresholds_but_no_run_threshold(toy_config):
    config = copy.deepcopy(toy_config)
    config["thresholds"]["run"] = {"fdr05": {"method": "fdr", "q": 0.05}}
    combos = plan.WorkflowPlan(config, RUNS).report_combos()
    assert "run_thresholds" not in combos
    assert {c["contrast"] for c in combos["subject_thresholds"]} == {"tap", "flash", "horn", "flash_minus_horn"}
    assert len(combos["group_thresholds"]) == len(combos["models"]) == len(combos["permuted"]) == 4


@pytest.mark.parametrize("edit, words", [
    (lambda c: c["contrasts"].update({"bad-name": {"weights": {"tap": 1}}}), "contrast name 'bad-name'"),
    (lambda c: c["thresholds"]["subject"].update({"q.01": {"method": "fdr"}}), "thresholds.subject name 'q.01'"),
    (lambda c: c["group_models"]["everyone"]["contrasts"].append("any_task"),
     "group_models.everyone.contrasts: 'any_task' is not a t contrast"),
])
def test_names_are_checked_in_one_line(toy_config, edit, words):
    config = copy.deepcopy(toy_config)
    edit(config)
    with pytest.raises(ConfigError) as err:
        plan.check_names(config)
    assert words in str(err.value) and "\n" not in str(err.value)
    plan.check_names(toy_config)  # the toy config itself passes
