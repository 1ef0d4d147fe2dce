"""The toy study's report: rendered in headless Chromium, complete, linked, cached, audited.

Chromium is Debian's ``chromium`` package (``.ci/run`` installs it when missing). The page is
loaded from disk with ``--dump-dom`` (the DOM after the page's script ran) and
``--screenshot``; console messages come from ``--enable-logging=stderr`` (the pages log
nothing, so any console line is a failure). The screenshots are kept under the results
folder (``results/report-screenshots/``) as CI artefacts.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import time
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote, urlsplit

import numpy as np
import pandas as pd
import pytest

from glmsteps.fileio import read_json

pytestmark = [pytest.mark.workflow, pytest.mark.slow]

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--hide-scrollbars", "--virtual-time-budget=5000")


def _need_chromium() -> None:
    if not os.path.exists(CHROMIUM):
        pytest.skip("chromium is not installed (apt-get install -y chromium; .ci/run installs it)")


def chromium(page: Path, profile: Path, *args: str) -> subprocess.CompletedProcess[str]:
    """Run headless Chromium on a page from disk with a fresh, empty profile."""
    profile.mkdir(parents=True, exist_ok=True)
    cmd = [CHROMIUM, *FLAGS, f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0", *args,
           page.resolve().as_uri()]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120)


class Dom(HTMLParser):
    """ids, image sources, links and classes of a dumped DOM."""

    def __init__(self, text: str) -> None:
        super().__init__()
        self.ids: set[str] = set()
        self.images: list[str] = []
        self.links: list[str] = []
        self.classes: set[str] = set()
        self.body: dict[str, str] = {}
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        a = {k: v or "" for k, v in attrs}
        if "id" in a:
            self.ids.add(a["id"])
        self.classes.update(a.get("class", "").split())
        if tag == "img":
            self.images.append(a.get("src", ""))
        if tag == "a" and a.get("href"):
            self.links.append(a["href"])
        if tag == "body":
            self.body = a


def _console_lines(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


def _local_target(page: Path, href: str) -> Path | None:
    """The file a relative link points to (None for an in-page anchor)."""
    parts = urlsplit(href)
    assert parts.scheme in ("", "file"), f"{page.name}: link to the network: {href}"
    if not parts.path:
        return None
    return (page.parent / unquote(parts.path)).resolve()


def _check_page(page: Path, profile: Path, screenshot: Path | None = None) -> Dom:
    """Load a page: no console message, the script ran, every image exists and decodes, every link resolves."""
    from matplotlib.image import imread

    proc = chromium(page, profile, "--dump-dom")
    assert proc.returncode == 0, proc.stderr[-2000:]
    dom = Dom(proc.stdout)
    assert not _console_lines(proc.stderr), _console_lines(proc.stderr)
    assert dom.body.get("data-ready") == "yes", f"{page.name}: the page's script did not run to its end"
    assert "missing" not in dom.classes, f"{page.name}: an image failed to load"
    for src in dom.images:
        target = _local_target(page, src)
        assert target is not None and target.is_file(), f"{page.name}: missing image {src}"
        assert imread(target).size > 0
    for href in dom.links:
        target = _local_target(page, href)
        if target is not None:
            assert target.exists(), f"{page.name}: broken link {href}"
        else:
            assert unquote(urlsplit(href).fragment) in dom.ids, f"{page.name}: no anchor for {href}"
    if screenshot is not None:
        screenshot.parent.mkdir(parents=True, exist_ok=True)
        shot = chromium(page, profile, f"--screenshot={screenshot}", "--window-size=1280,2200")
        assert shot.returncode == 0 and screenshot.is_file(), shot.stderr[-2000:]
        pixels = imread(screenshot)[..., :3]
        # not blank: the page has text, figures and colour (a blank page is one colour)
        assert pixels.std() > 0.05
        assert len(np.unique((pixels.reshape(-1, 3) * 255).astype(np.uint8), axis=0)) > 200
    return dom


def _check_static(page: Path) -> Dom:
    """The same checks on the page as written (no browser): images exist and decode, links resolve."""
    from matplotlib.image import imread

    dom = Dom(page.read_text(encoding="utf-8"))
    for src in dom.images:
        target = _local_target(page, src)
        assert target is not None and target.is_file(), f"{page.name}: missing image {src}"
        assert imread(target).size > 0
    for href in dom.links:
        target = _local_target(page, href)
        if target is not None:
            assert target.exists(), f"{page.name}: broken link {href}"
        else:
            assert unquote(urlsplit(href).fragment) in dom.ids, f"{page.name}: no anchor for {href}"
    return dom


def test_toy_report_in_headless_chromium(toy_results, tmp_path):
    """The study page and subject pages load from disk in Chromium without a console message or a missing
    image; every subject, group model and contrast has its section; every link to a map resolves. Chromium
    opens the study page and two subject pages (each start costs seconds); every page is also checked as
    written."""
    _need_chromium()
    report = toy_results.results / "report"
    shots = toy_results.results / "report-screenshots"
    study = _check_page(report / "index.html", tmp_path / "profile", shots / "study-page.png")
    config = toy_results.config
    index = pd.read_csv(toy_results.results / "index.tsv", sep="\t", dtype=str, keep_default_na=False)
    subjects = sorted({s for s in index["subject"] if s})
    assert len(subjects) == 12
    for s in subjects:
        assert f"subject-{s}" in study.ids
    for contrast in config["contrasts"]:
        assert f"contrast-{contrast}" in study.ids
    for model, spec in config["group_models"].items():
        assert f"model-{model}" in study.ids
        for c in spec["contrasts"]:
            for g in spec["group_contrasts"]:
                assert f"group-{model}-{c}-{g}" in study.ids
    # the study page links to every group map of the index (and every link resolves, checked above)
    linked = {(report / unquote(h)).resolve() for h in study.links if not h.startswith("#")}
    for path in index.loc[index["level"] == "group", "path"]:
        assert (toy_results.results / path).resolve() in linked, path
    t_contrasts = [c for c, spec in config["contrasts"].items() if "weights" in spec]
    for n, s in enumerate(subjects):
        page = report / f"sub-{s}.html"
        if n in (0, len(subjects) - 1):
            dom = _check_page(page, tmp_path / f"profile-{s}", shots / f"sub-{s}.png" if n == 0 else None)
        else:
            dom = _check_static(page)
        for c in t_contrasts:
            assert f"map-{c}" in dom.ids
        for run in sorted((toy_results.results / f"sub-{s}").glob("task-*_run-*")):
            assert f"run-{run.name}" in dom.ids
        # the subject's maps are linked
        linked = {(page.parent / unquote(h)).resolve() for h in dom.links if not h.startswith("#")}
        for path in index.loc[(index["level"] == "subject") & (index["subject"] == s), "path"]:
            assert (toy_results.results / path).resolve() in linked, path
        # the run figures are the design step's own PNGs, copied (same bytes), not redrawn
        design = [src for src in dom.images if Path(src).name.startswith("design-")]
        assert design
        first_run = sorted((toy_results.results / f"sub-{s}").glob("task-*_run-*"))[0]
        copies = {(page.parent / src).read_bytes() for src in design}
        assert (first_run / "design.png").read_bytes() in copies


def test_report_records_its_work_and_a_rerun_draws_nothing(toy_results, tmp_path):
    """The report's sidecar says what it drew; forcing the report job again redraws nothing and writes
    byte-identical pages (every figure comes from the lineage-keyed cache)."""
    work = _copy_workspace(toy_results, tmp_path / "copy")
    report = work.results / "report"
    before = {p.name: p.read_bytes() for p in report.glob("*.html")}
    first = read_json(report / "index.json")
    assert first["step"] == "report"
    work.snakemake("--cores", "1", "--forcerun", "report")
    facts = read_json(report / "index.json")
    assert facts["figures_drawn"] == [] and facts["figures_copied"] == []
    assert facts["audit_texts_written"] == 0 and facts["qc_entries_computed"] == 0
    assert facts["figures_reused"] >= 12 * 4 + 4
    after = {p.name: p.read_bytes() for p in report.glob("*.html")}
    assert after == before


def test_a_new_contrast_draws_only_its_own_figures(toy_results, tmp_path):
    """Adding a contrast reruns the report once; it draws the new contrast's 12 subject mosaics and the
    efficiency figure (which shows every contrast), nothing else; the new contrast has its sections."""
    work = _copy_workspace(toy_results, tmp_path / "copy")
    work.config["contrasts"]["tap_minus_flash"] = {"weights": {"tap": 1, "flash": -1}}
    work.write_config()
    started = time.perf_counter()
    proc = work.snakemake("--cores", "2")
    elapsed = time.perf_counter() - started
    facts = read_json(work.results / "report" / "index.json")
    drawn = facts["figures_drawn"]
    mosaics = [d for d in drawn if d.startswith("mosaic-")]
    assert len(mosaics) == 12, drawn
    assert [d for d in drawn if not d.startswith("mosaic-")] == [d for d in drawn if d.startswith("efficiency-")]
    assert len(drawn) == 13 and facts["figures_copied"] == []
    text = (work.results / "report" / "index.html").read_text(encoding="utf-8")
    assert 'id="contrast-tap_minus_flash"' in text
    assert 'id="map-tap_minus_flash"' in (work.results / "report" / "sub-01.html").read_text(encoding="utf-8")
    log = (work.results / "logs" / "report.log").read_text(encoding="utf-8")
    took = re.findall(r"done in ([0-9.]+) s", log)
    print(f"\nadding a contrast: whole run {elapsed:.1f} s, report job {took[-1] if took else '?'} s, "
          f"{len(drawn)} figures drawn, {facts['figures_reused']} reused")
    assert "glmsteps: finished." in proc.stdout and "report:" in proc.stdout


def test_embedded_audit_chain_is_the_audit_command_text(toy_results):
    """The chain a page shows for a map is what `glmsteps audit` prints for it."""
    report = toy_results.results / "report"
    page = (report / "sub-01.html").read_text(encoding="utf-8")
    m = re.search(r'<a class="map-link" href="([^"]+thresholded\.nii\.gz)">.*?<a href="(audit/[^"]+\.txt)">', page,
                  re.S)
    assert m, "no thresholded map with an audit chain on sub-01.html"
    target = (report / unquote(m.group(1))).resolve()
    proc = subprocess.run([sys.executable, "-m", "glmsteps.cli", "audit",
                           os.path.relpath(target, toy_results.workdir)], cwd=toy_results.workdir,
                          capture_output=True, text=True, env={**os.environ, "PYTHONPATH": str(Path.cwd())})
    assert proc.returncode == 0, proc.stderr
    assert (report / m.group(2)).read_text(encoding="utf-8") == proc.stdout


def test_terminal_summary_of_the_toy_run(toy_results):
    from glmsteps.report.summary import collect_run_summary, format_run_summary

    summary = collect_run_summary(toy_results.results, started=0.0)
    text = format_run_summary(summary, ok=True)
    index = pd.read_csv(toy_results.results / "index.tsv", sep="\t")
    assert summary.n_maps == len(index) == summary.n_written
    assert f"maps: {len(index)} in" in text and "report/index.html" in text and summary.report_current
    assert len(text.splitlines()) <= 6


def _copy_workspace(ws, dest: Path):
    """A copy of a finished workspace that Snakemake sees as up to date (big files hard-linked)."""
    from workflow_helpers import Workspace

    def copy(src: str, dst: str) -> None:
        if src.endswith((".nii.gz", ".h5")) and os.path.getsize(src) > 65536:
            try:
                os.link(src, dst)
                return
            except OSError:
                pass
        shutil.copy2(src, dst)

    shutil.copytree(ws.workdir, dest, copy_function=copy, ignore=shutil.ignore_patterns("locks", "report-screenshots"))
    config = json.loads(json.dumps(ws.config))
    copied = Workspace(workdir=dest, data=ws.data, config=config)
    copied.write_config()
    os.utime(copied.config_path, ns=(os.stat(ws.config_path).st_atime_ns, os.stat(ws.config_path).st_mtime_ns))
    return copied


def test_copied_workspace_plans_nothing(toy_results, tmp_path):
    """The copy the cache tests start from is up to date (so they measure only what they change)."""
    work = _copy_workspace(toy_results, tmp_path / "copy")
    proc = work.snakemake("--dry-run", "--cores", "1")
    assert "Nothing to be done" in proc.stdout + proc.stderr, proc.stdout[-2000:]
