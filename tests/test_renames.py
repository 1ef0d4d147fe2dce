"""Tests of glmsteps.renames: renamed keywords and old design column names are one-line errors."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
import yaml

from glmsteps import design as gd
from glmsteps.errors import ConfigError
from glmsteps.hrf import HRF_MODELS
from glmsteps.renames import RENAMED_HRF, check_renamed, renamed_column

SCHEMA = yaml.safe_load((Path(__file__).resolve().parents[1] / "config" / "schema.yaml").read_text())
OLD_COLUMN_WORDS = ("__derivative", "__dispersion", "drift_")


def test_schema_lists_the_new_hrf_keywords_only():
    enum = SCHEMA["properties"]["design"]["properties"]["hrf"]["enum"]
    assert tuple(enum) == HRF_MODELS
    assert not set(RENAMED_HRF) & set(enum)
    assert set(RENAMED_HRF.values()) <= set(enum)
    assert "glover_1999" in enum  # the literature shape is spelled as a citation: author and year


@pytest.mark.parametrize("old", sorted(RENAMED_HRF))
def test_old_hrf_keyword_is_an_error_naming_the_new_one(old):
    with pytest.raises(ConfigError) as info:
        check_renamed({"design": {"hrf": old}, "contrasts": {"a": {"weights": {"a": 1}}}})
    msg = str(info.value)
    assert "\n" not in msg and "design.hrf" in msg and repr(old) in msg and repr(RENAMED_HRF[old]) in msg


@pytest.mark.parametrize(("spec", "where", "old", "new"), [
    ({"weights": {"tap": 1, "tap__derivative": -1}}, "weights", "tap__derivative", "tap__latency"),
    ({"rows": [{"tap": 1}, {"tap__dispersion": 1}]}, "rows[1]", "tap__dispersion", "tap__width"),
    ({"weights": {"drift_02": 1}}, "weights", "drift_02", "slow_02"),
])
def test_old_column_names_in_contrast_weights_are_errors(spec, where, old, new):
    with pytest.raises(ConfigError) as info:
        check_renamed({"contrasts": {"c1": spec}})
    msg = str(info.value)
    assert "\n" not in msg and f"contrasts.c1.{where}" in msg and repr(old) in msg and repr(new) in msg


def test_current_names_pass():
    config = {"design": {"hrf": "double_gamma_latency_width"},
              "contrasts": {"a": {"weights": {"tap": 1, "tap__latency": 1, "tap__width": 1, "slow_01": 1,
                                              "drift": 1, "drift_x": 1, "intercept": 1}},
                            "f": {"rows": [{"tap__all": 1}]}}}
    check_renamed(config)
    check_renamed({})  # sections may be missing (defaults come later)
    assert renamed_column("derivative") is None and renamed_column("__derivative") is None


def test_design_columns_carry_only_the_new_names():
    ft = gd.frame_times(80, 2.0)
    events = pd.DataFrame({"onset": [4.0, 30.0, 60.0, 100.0], "duration": [2.0, 0.0, 2.0, 0.0],
                           "condition": ["go", "stop", "go", "stop"]})
    for hrf in HRF_MODELS:
        kwargs = {"fir_bins": 3, "fir_bin_width_s": 2.0} if hrf == "fir" else {}
        for drift in ("cosine", "legendre"):
            design = gd.build_design(events, ft, hrf=hrf, drift_basis=drift, **kwargs)
            assert not [n for n in design.names if any(w in n for w in OLD_COLUMN_WORDS)], (hrf, design.names)
            assert not {"derivative", "dispersion"} & set(design.basis)
            assert all(n.startswith("slow_") for n, r in zip(design.names, design.roles) if r == "drift")
    design = gd.build_design(events, ft, hrf="double_gamma_latency_width", drift_basis="cosine")
    assert design.names[:3] == ("go", "go__latency", "go__width")
    assert design.basis[:3] == ("main", "latency", "width")
