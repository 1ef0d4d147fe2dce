"""Tests of the build_design job on small files in tmp_path."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from glmsteps.errors import ConfigError, DesignError
from glmsteps.jobs import build_design as job

N_VOLUMES = 60
DROP = 3
TR_S = 2.0


def default_params(**changes: Any) -> dict[str, Any]:
    params: dict[str, Any] = {
        "hrf": "double_gamma", "fir_bins": 10, "fir_bin_width_s": 2.0, "time_resolution_s": 0.1,
        "drift_basis": "cosine", "cutoff_s": 128.0, "legendre_order": 3,
        "volume_time_fraction": 0.5, "conditions": ["faces", "houses"], "modulators": {"faces": ["rating"]},
    }
    params.update(changes)
    return params


def write_inputs(folder: Path, *, excluded: bool = False, extra_confounds: dict[str, np.ndarray] | None = None,
                 n_rows: int = N_VOLUMES, tr_s: float = TR_S, n_bold: int = N_VOLUMES) -> dict[str, str]:
    folder.mkdir(parents=True, exist_ok=True)
    events = pd.DataFrame({
        "onset": [0.0, 14.0, 30.5, 47.0, 62.0, 80.0, 95.5, 110.0],
        "duration": [0.0, 3.0, 0.0, 3.0, 0.0, 3.0, 0.0, 3.0],
        "condition": ["faces", "houses"] * 4,
        "rating": [1.0, "n/a", 3.0, "n/a", 2.0, "n/a", 5.0, "n/a"],
    })
    events.to_csv(folder / "events.tsv", sep="\t", index=False)
    rng = np.random.default_rng(7)
    confounds = {"motion_x": rng.normal(size=n_rows), "spike_0001": np.eye(n_rows)[1],
                 "spike_0040": np.eye(n_rows)[40]}
    confounds.update(extra_confounds or {})
    pd.DataFrame(confounds).to_csv(folder / "confounds.tsv", sep="\t", index=False)
    summary = {"n_volumes": N_VOLUMES, "drop_initial_volumes": DROP, "excluded": excluded, "censored": [1, 40]}
    (folder / "confounds.json").write_text(json.dumps(summary))
    acquisition = {"repetition_time_s": tr_s, "source": "sidecar", "source_file": "bold.json",
                   "slice_timing_s": None, "configured_repetition_time_s": None}
    (folder / "events.json").write_text(json.dumps({"repetition_time_s": tr_s, "n_volumes": n_bold,
                                                    "acquisition": acquisition}))
    return {"events": str(folder / "events.tsv"), "events_summary": str(folder / "events.json"),
            "confounds": str(folder / "confounds.tsv"), "confounds_summary": str(folder / "confounds.json")}


def outputs_in(folder: Path) -> dict[str, str]:
    return {"design": str(folder / "design.tsv"), "summary": str(folder / "design.json"),
            "figure": str(folder / "design.png"), "correlation_figure": str(folder / "design_correlation.png")}


def sha256(path: str | Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()  # reference: hashlib sha256 of the file bytes


def test_job_writes_design_summary_and_figures(tmp_path: Path) -> None:
    inputs = write_inputs(tmp_path / "in")
    outputs = outputs_in(tmp_path / "out")
    params = default_params()
    job.run(inputs, outputs, params, {"subject": "01", "task": "faces", "run": "1"})

    design = pd.read_csv(outputs["design"], sep="\t")
    summary = json.loads(Path(outputs["summary"]).read_text())
    assert design.shape[0] == N_VOLUMES - DROP
    assert list(design.columns) == summary["names"]
    assert summary["names"][:3] == ["faces", "faces__x_rating", "houses"]
    assert "spike_0001" not in summary["names"]  # its volume is dropped: left out with a warning
    assert "spike_0040" in summary["names"] and summary["roles"][summary["names"].index("spike_0040")] == "spike"
    assert any("spike_0001" in w for w in summary["warnings"])
    assert summary["first_volume"] == DROP and summary["n_volumes"] == N_VOLUMES - DROP
    assert summary["excluded"] is False
    assert summary["frame_times_s"][0] == pytest.approx((DROP + 0.5) * TR_S)
    assert summary["diagnostics"]["rank"] == design.shape[1]
    assert set(summary["diagnostics"]["vif"]) == {"faces", "faces__x_rating", "houses"}
    assert summary["basis"][:3] == ["main", "modulator", "main"]
    assert summary["conditions"][:3] == ["faces", "faces", "houses"]
    # the spike column keeps its volume: row 40 - DROP of the kept rows
    np.testing.assert_array_equal(np.nonzero(design["spike_0040"].to_numpy())[0], [40 - DROP])

    # The event at 0 s precedes the first kept volume (7 s) but still shapes it: value = normalised HRF at 7 s.
    # reference: scipy.stats.gamma.pdf double gamma (Friston et al. 1998, from memory), normalised to unit
    # sum x dt on [0, 32) s; tolerance: split + interpolation error dt^2/4 max|h''| (< 1e-4 of the peak)
    t = np.arange(320) * 0.1
    h = stats.gamma.pdf(t, 6.0) - stats.gamma.pdf(t, 16.0) / 6.0
    at_7s = stats.gamma.pdf(7.0, 6.0) - stats.gamma.pdf(7.0, 16.0) / 6.0  # later faces events start after 7 s
    expected_first = at_7s / (h.sum() * 0.1)
    assert design["faces"].iloc[0] == pytest.approx(expected_first, abs=2e-5)

    record = summary["provenance"]
    assert record["step"] == "build_design"
    assert summary["repetition_time_s"] == TR_S and summary["acquisition"]["source"] == "sidecar"
    for key in ("events", "events_summary", "confounds", "confounds_summary"):
        assert record["inputs"][key]["sha256"] == sha256(inputs[key])
        assert record["inputs"][key]["lineage_hash"] == sha256(inputs[key])  # raw inputs: lineage = content
    # reference: sha256 of canonical JSON (sorted keys, no spaces), written out here with json.dumps
    canonical = json.dumps(params, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    assert record["params_hash"] == hashlib.sha256(canonical.encode("utf-8")).hexdigest()

    side = json.loads((tmp_path / "out" / "design_correlation.json").read_text())
    assert side["lineage_hash"] == record["lineage_hash"] and side["excluded"] is False
    for key in ("figure", "correlation_figure"):
        assert Path(outputs[key]).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # reference: PNG signature
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == sorted(
        ["design.tsv", "design.json", "design.png", "design_correlation.png", "design_correlation.json"])


def test_rank_deficient_design_is_an_error_with_no_output(tmp_path: Path) -> None:
    inputs = write_inputs(tmp_path / "in", extra_confounds={"scanner_on": np.full(N_VOLUMES, 5.0)})
    out = tmp_path / "out"
    with pytest.raises(DesignError) as info:
        job.run(inputs, outputs_in(out), default_params(), {})
    message = str(info.value)
    assert "\n" not in message and "events.tsv" in message
    assert "scanner_on" in message and "intercept" in message
    assert not out.exists() or not any(out.iterdir())


def test_excluded_run_passes_through_rank_deficiency(tmp_path: Path) -> None:
    inputs = write_inputs(tmp_path / "in", excluded=True, extra_confounds={"scanner_on": np.full(N_VOLUMES, 5.0)})
    outputs = outputs_in(tmp_path / "out")
    job.run(inputs, outputs, default_params(), {"subject": "02"})
    summary = json.loads(Path(outputs["summary"]).read_text())
    assert summary["excluded"] is True and summary["provenance"]["excluded"] is True
    assert summary["diagnostics"]["collinear"] == ["scanner_on", "intercept"]
    assert json.loads((tmp_path / "out" / "design_correlation.json").read_text())["excluded"] is True
    assert all(Path(p).exists() for p in outputs.values())


@pytest.mark.parametrize(("changes", "error", "pattern"), [
    ({"time_resolution_s": 0.2}, ConfigError, "0.1"),
    ({"hrf": "boxcar"}, ConfigError, "hrf"),
    ({"hrf": "fir", "fir_bins": 0}, ConfigError, "fir_bins"),
    ({"volume_time_fraction": 2.0}, ConfigError, "volume_time_fraction"),
    ({"modulators": {"faces": ["speed"]}}, DesignError, "speed"),
])
def test_bad_settings_write_nothing(tmp_path: Path, changes: dict[str, Any], error: type, pattern: str) -> None:
    inputs = write_inputs(tmp_path / "in")
    out = tmp_path / "out"
    with pytest.raises(error, match=pattern):
        job.run(inputs, outputs_in(out), default_params(**changes), {})
    assert not out.exists() or not any(out.iterdir())


def test_confounds_row_count_mismatch_names_the_file(tmp_path: Path) -> None:
    inputs = write_inputs(tmp_path / "in", n_rows=N_VOLUMES - 1)
    with pytest.raises(DesignError, match=r"confounds\.tsv: 59 rows, expected one per volume \(60\)"):
        job.run(inputs, outputs_in(tmp_path / "out"), default_params(), {})
    assert not (tmp_path / "out").exists()


def test_fir_and_legendre_job(tmp_path: Path) -> None:
    inputs = write_inputs(tmp_path / "in")
    outputs = outputs_in(tmp_path / "out")
    job.run(inputs, outputs, default_params(hrf="fir", fir_bins=4, fir_bin_width_s=4.0, modulators={},
                                            drift_basis="legendre", legendre_order=2), {})
    summary = json.loads(Path(outputs["summary"]).read_text())
    assert summary["names"][:4] == ["faces__fir00", "faces__fir01", "faces__fir02", "faces__fir03"]
    assert summary["names"][-3:] == ["slow_01", "slow_02", "intercept"]


def test_design_takes_the_tr_of_its_run_from_events_json(tmp_path: Path) -> None:
    # two runs of one study at different TRs, one set of params: each design uses its own run's TR
    for tr in (2.0, 0.8):
        inputs = write_inputs(tmp_path / f"in{tr}", tr_s=tr)
        outputs = outputs_in(tmp_path / f"out{tr}")
        job.run(inputs, outputs, default_params(hrf="double_gamma", modulators={}), {"subject": "01"})
        summary = json.loads(Path(outputs["summary"]).read_text())
        # worked by hand: frame time of kept row j = (DROP + j + 0.5) x TR (volume_time_fraction 0.5)
        expected = [(DROP + j + 0.5) * tr for j in range(N_VOLUMES - DROP)]
        np.testing.assert_allclose(summary["frame_times_s"], expected, rtol=0, atol=1e-12)
        assert summary["repetition_time_s"] == tr


def test_volume_counts_of_events_and_confounds_summaries_must_agree(tmp_path: Path) -> None:
    inputs = write_inputs(tmp_path / "in", n_bold=N_VOLUMES + 1)
    with pytest.raises(DesignError, match=r"events\.json: the BOLD has 61 volumes but .*confounds\.json counts 60"):
        job.run(inputs, outputs_in(tmp_path / "out"), default_params(), {})
    assert not (tmp_path / "out").exists()
