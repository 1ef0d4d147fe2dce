"""The report job's settings check and input mapping (the whole job runs in test_report_workflow.py)."""

from __future__ import annotations

import pytest
import yaml

from glmsteps.errors import ConfigError
from glmsteps.jobs import report as job
from glmsteps.settings import ReportSettings
from workflow_helpers import REPO


def test_defaults_are_the_schemas():
    schema = yaml.safe_load((REPO / "config" / "schema.yaml").read_text())["properties"]["report"]["properties"]
    settings = ReportSettings.from_params({})
    for key, spec in schema.items():
        assert getattr(settings, key) == spec["default"], key


@pytest.mark.parametrize("params, key", [({"outlier_mads": 0}, "outlier_mads"),
                                         ({"min_relative_spread": 1.5}, "min_relative_spread"),
                                         ({"mosaic_slices": 0}, "mosaic_slices"),
                                         ({"outlier_mads": "many"}, "report")])
def test_bad_settings_are_one_line_config_errors(params, key):
    with pytest.raises(ConfigError) as err:
        ReportSettings.from_params(params)
    assert key in str(err.value) and "\n" not in str(err.value)


def test_inputs_become_sources():
    sources = job.sources_from({"index": "r/index.tsv", "participants": [], "fit": ["a/fit.h5", "b/fit.h5"],
                                "thresholded": "x/thresholded.nii.gz"})
    assert sources.index == "r/index.tsv" and sources.participants == ""
    assert sources.fits == ("a/fit.h5", "b/fit.h5") and sources.thresholded == ("x/thresholded.nii.gz",)
    assert sources.site_qc == ()
    with pytest.raises(ConfigError):
        job.sources_from({"fit": []})


def test_outputs_are_checked_before_reading_anything(tmp_path):
    with pytest.raises(ConfigError) as err:
        job.run({"index": str(tmp_path / "missing.tsv")}, {"study": str(tmp_path / "index.html")}, {}, {})
    assert "qc_table" in str(err.value)


@pytest.mark.parametrize("block, mean, largest", [
    ({"framewise_displacement_mm": {"mean": 0.12, "max": 0.9}}, 0.12, 0.9),
    ({"mean_fd_mm": 0.2, "max_fd_mm": 1.1, "n_over": 3}, 0.2, 1.1),
    ({"fd_mean": 0.3}, 0.3, float("nan")),
])
def test_motion_block_of_confounds_json_is_read_whatever_its_keys(block, mean, largest):
    """The confounds step's coming ``motion`` block is used when present, found by key words."""
    import math

    from glmsteps.report.collect import _motion_from_block

    got = _motion_from_block(block)
    assert got is not None and got[0] == pytest.approx(mean)
    assert (math.isnan(got[1]) and math.isnan(largest)) or got[1] == pytest.approx(largest)
    assert "motion block" in got[2]
    assert _motion_from_block({"note": "none"}) is None and _motion_from_block(None) is None
