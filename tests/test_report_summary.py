"""The end-of-run terminal summary, on a small made-up results folder."""

from __future__ import annotations

import io
import json
import os
import time

from glmsteps.report.summary import RunSummary, collect_run_summary, format_run_summary, print_run_summary

HEADER = "level\tsubject\tsession\ttask\trun\tcontrast\tstat\tpath\tstatus\tparams_hash\tlineage_hash\n"


def _results(tmp_path, with_report: bool):
    out = tmp_path / "results"
    rows = [("run", "01", "", "beacon", "1", "tap", "z", "sub-01/a/z.nii.gz", "ok", "p1", "l1", ["fit: slow"]),
            ("run", "01", "", "beacon", "2", "tap", "z", "sub-01/b/z.nii.gz", "excluded", "p1", "l2", []),
            ("run", "01", "", "beacon", "2", "tap", "p", "sub-01/b/p.nii.gz", "excluded", "p1", "l2", []),
            ("subject", "01", "", "beacon", "", "tap", "z", "sub-01/c/z.nii.gz", "skipped", "p2", "l3", ["x", "y"])]
    lines = [HEADER]
    for *cells, warnings in rows:
        path = out / cells[7]
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(b"")
        step = "contrast" if cells[0] == "run" else "combine_runs"
        (path.parent / (path.name.split(".")[0] + ".json")).write_text(
            json.dumps({"step": step, "lineage_hash": cells[10], "warnings": warnings}))
        lines.append("\t".join(cells) + "\n")
    old = time.time() - 3600
    os.utime(out / "sub-01/b/z.nii.gz", (old, old))
    (out / "index.tsv").write_text("".join(lines))
    if with_report:
        (out / "report").mkdir()
        (out / "report" / "index.html").write_text("<html></html>")
        (out / "report" / "index.json").write_text(json.dumps({
            "step": "report", "lineage_hash": "r", "excluded_runs": ["sub-01 task-beacon_run-2: 40 % censored"],
            "warnings_by_step": {"fit": 2, "group": 0}}))
    return out


def test_summary_from_the_index_alone(tmp_path):
    out = _results(tmp_path, with_report=False)
    s = collect_run_summary(out, started=time.time() - 60)
    assert s.n_maps == 4 and s.n_written == 3
    assert s.by_status == {"ok": 1, "excluded": 2, "skipped": 1}
    assert s.excluded_runs == ("sub-01 task-beacon run-2",)
    # one sidecar per job (lineage): contrast 1 warning, combine_runs 2
    assert s.warnings_by_step == {"contrast": 1, "combine_runs": 2}
    text = format_run_summary(s, ok=True)
    assert "maps: 4 in" in text and "3 written by this run; 2 excluded, 1 skipped" in text
    assert "report: not built" in text


def test_summary_prefers_the_reports_counts(tmp_path):
    out = _results(tmp_path, with_report=True)
    s = collect_run_summary(out, started=0.0)
    assert s.report_current and s.excluded_runs == ("sub-01 task-beacon_run-2: 40 % censored",)
    text = format_run_summary(s, ok=False)
    lines = text.splitlines()
    assert lines[0].startswith("glmsteps: stopped by an error")
    assert "runs excluded: 1 (sub-01 task-beacon_run-2: 40 % censored)" in text
    assert "warnings: fit 2 (in the sidecars and the report)" in text
    assert f"file://{os.path.abspath(out / 'report' / 'index.html')}" in text
    # stopped, but no job log of this run records an error: the summary says where to look
    assert "failed: see Snakemake's error above" in text
    assert len(lines) == 6


def test_a_stopped_run_names_each_failed_job_its_error_and_log(tmp_path):
    out = _results(tmp_path, with_report=False)
    logs = out / "logs" / "sub-02" / "task-beacon_run-1"
    logs.mkdir(parents=True)
    bad = logs / "fit.log"
    bad.write_text("2026-12-03 13:34:31,779 INFO reading bold\n"
                   "2026-12-03 13:34:35,144 ERROR DataError: sub-02_bold.nii.gz: cannot decompress; copy it again\n"
                   "2026-12-03 13:34:35,145 ERROR second error line\n")
    (logs / "build_design.log").write_text("2026-12-03 13:34:30,000 INFO done in 2.07 s\n")
    old = logs / "select_confounds.log"                  # an error of an earlier run: not this run's
    old.write_text("2026-12-02 10:00:00,000 ERROR ConfoundsError: old\n")
    then = time.time() - 3600
    os.utime(old, (then, then))
    s = collect_run_summary(out, started=time.time() - 60)
    assert s.failed_jobs == ((os.fspath(bad), "DataError: sub-02_bold.nii.gz: cannot decompress; copy it again"),)
    text = format_run_summary(s, ok=False)
    assert f"  failed: {bad}: DataError: sub-02_bold.nii.gz: cannot decompress; copy it again" in text
    assert "see Snakemake's error above" not in text and "ConfoundsError" not in text


def test_many_excluded_runs_are_counted_not_listed():
    s = RunSummary(10, 0, {"ok": 10}, tuple(f"sub-{i:02d} run-1: r" for i in range(8)), {}, "i.tsv", "r.html", True)
    text = format_run_summary(s, ok=True)
    assert "runs excluded: 8 (" in text and "and 3 more" in text


def test_summary_never_raises(tmp_path):
    stream = io.StringIO()
    (tmp_path / "results").mkdir()
    (tmp_path / "results" / "index.tsv").write_bytes(b"\xff\xfe not text")
    print_run_summary(tmp_path / "results", 0.0, ok=True, stream=stream)
    assert stream.getvalue().startswith("glmsteps: finished")
    stream = io.StringIO()
    print_run_summary(tmp_path / "nothing", 0.0, ok=False, stream=stream)
    assert "no index.tsv yet" in stream.getvalue()
