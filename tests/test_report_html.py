"""HTML structure of the report pages, rendered from a small hand-made report model."""

from __future__ import annotations

import math
from html.parser import HTMLParser

from glmsteps.report import html
from glmsteps.report.model import (ContrastInfo, Figure, FileLink, MapSection, ModelSection, Report, RunQc,
                                   RunSection, SettingsRow, SubjectPage, Table)

LINEAGE = "ab" * 32


class Page(HTMLParser):
    """Collects ids, images, links, scripts and <details> blocks of a page."""

    def __init__(self, text: str) -> None:
        super().__init__()
        self.ids: list[str] = []
        self.images: list[dict[str, str]] = []
        self.links: list[str] = []
        self.scripts: list[dict[str, str]] = []
        self.details = 0
        self.stack: list[str] = []
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        a = {k: v or "" for k, v in attrs}
        if "id" in a:
            self.ids.append(a["id"])
        if tag == "img":
            self.images.append(a)
        if tag == "a" and "href" in a:
            self.links.append(a["href"])
        if tag == "script":
            self.scripts.append(a)
        if tag == "details":
            self.details += 1
        if tag not in ("img", "meta", "br", "input"):
            self.stack.append(tag)

    def handle_endtag(self, tag):
        assert self.stack and self.stack[-1] == tag, (tag, self.stack[-5:])
        self.stack.pop()


def _link(name: str, audit: bool = True) -> FileLink:
    return FileLink(label=name, href=f"../sub-01/combined/contrast-tap/{name}", lineage_hash=LINEAGE,
                    audit_href=f"audit/{name}.txt" if audit else "",
                    audit_text=f"provenance of <{name}>\n[1] combine_runs" if audit else "")


def _report() -> Report:
    qc = RunQc(subject="01", session="", task="beacon", run="1", run_id="task-beacon_run-1", site="north",
               excluded=False, reason="", values={"censored_fraction": 0.05, "tsnr": 81.2, "motion_mean": math.nan},
               ar_quantiles=(0.0, 0.1, 0.2, 0.3, 0.4), efficiency={"tap": 9.5}, flags=frozenset({"tsnr"}),
               motion_source="column displacement_mm")
    excluded = RunQc(subject="01", session="", task="beacon", run="2", run_id="task-beacon_run-2", site="north",
                     excluded=True, reason="40 % of volumes censored > 25 %", values={}, ar_quantiles=(math.nan,) * 5,
                     efficiency={})
    thr = _link("thresholded.nii.gz")
    mosaic = Figure(src="figures/mosaic-1.png", alt="mosaic", caption="tap <b>", source=thr, scale=(3.1, 7.0, True),
                    slice_mm=(-20.0, 0.0, 20.0))
    clusters = Table(columns=("cluster", "peak x (mm)"), rows=(("1", "-22.0"),), caption="clusters",
                     source=FileLink("clusters.tsv", "../x/clusters.tsv", LINEAGE, thr.audit_href, thr.audit_text))
    sec = MapSection(anchor="map-tap", title="sub-01, contrast tap", summary="3 clusters", figure=mosaic,
                     tables=(clusters,), links=(_link("z.nii.gz", audit=False),), warnings=("combine_runs: careful",))
    gsec = MapSection(anchor="group-everyone-tap-mean", title="model everyone: tap", summary="", figure=mosaic)
    run = RunSection(qc=qc, figures=(Figure("figures/design-1.png", "design", "design", _link("design.tsv")),),
                     links=(_link("fit.h5"),), warnings=())
    page = SubjectPage(subject="01", site="north", filename="sub-01.html", runs=(run,), maps=(sec,), warnings=())
    return Report(title="Study report", glmsteps_version="0.1.0", results_label="results",
                  index=FileLink("index.tsv", "../index.tsv"), subjects=("01",), sites={"north": 1},
                  runs=(qc, excluded),
                  contrasts=(ContrastInfo("contrast-tap", "tap", "t", "tap", "median 9.5", (("group-everyone-tap-mean",
                                                                                           "model everyone: tap"),),
                                          "subject maps: 1 ok"),),
                  settings=(SettingsRow("fit", "2 run(s)", "cd" * 32, ("autocorrelation model: ar1",)),),
                  qc_figures=(Figure("figures/qc-1.png", "qc", "qc"),),
                  qc_measures=(("censored_fraction", "censored fraction"), ("tsnr", "temporal SNR"),
                               ("motion_mean", "motion, mean (mm)")),
                  outlier_rule="A value is flagged when ...", tsnr_definition="tSNR = ...",
                  models=(ModelSection("model-everyone", "everyone", "design: one_sample", (gsec,)),),
                  subject_pages=(page,), warnings_by_step={"combine_runs": 1})


def test_study_page_structure():
    text = html.render_study_page(_report())
    page = Page(text)
    assert not page.stack                                     # every element closed
    for anchor in ("glance", "settings", "qc", "contrasts", "contrast-tap", "group", "model-everyone",
                   "group-everyone-tap-mean", "subjects", "subject-01", "run-table", "only-flagged"):
        assert anchor in page.ids, anchor
    assert len(page.ids) == len(set(page.ids))                # ids are unique
    assert {i["src"] for i in page.images} == {"figures/qc-1.png", "figures/mosaic-1.png"}
    assert all(i.get("alt") for i in page.images)
    assert "sub-01.html" in page.links and "../index.tsv" in page.links
    assert "../sub-01/combined/contrast-tap/thresholded.nii.gz" in page.links
    # self-contained: inline script and style only, nothing fetched from a network
    assert page.scripts == [{}]
    assert "http://" not in text and "https://" not in text and "<link" not in text
    assert "lineage " + LINEAGE[:12] in text and LINEAGE in text      # short hash shown, full one in the tooltip
    assert "tap &lt;b&gt;" in text                             # text is escaped
    assert "40 % of volumes censored" in text                  # excluded run with its reason
    assert "A value is flagged when" in text and "tSNR = ..." in text


def test_flagged_values_and_excluded_runs_are_marked():
    text = html.render_study_page(_report())
    assert 'class="num flag" data-v="81.2"' in text
    assert '<tr class="excluded">' in text
    assert '<tr class="flagged">' in text


def test_audit_chain_embedded_once_per_page():
    """The mosaic and the cluster table show the same map: its chain is embedded once, then referred to."""
    text = html.render_subject_page(_report(), _report().subject_pages[0])
    page = Page(text)
    assert not page.stack
    assert text.count("provenance of &lt;thresholded.nii.gz&gt;") == 1
    assert text.count("provenance of &lt;design.tsv&gt;") == 1
    assert text.count("provenance of &lt;fit.h5&gt;") == 1
    assert "the same chain as" in text
    assert "audit/thresholded.nii.gz.txt" in page.links
    for anchor in ("run-task-beacon_run-1", "map-tap", "warnings"):
        assert anchor in page.ids
    assert "index.html" in page.links
    assert "warning: combine_runs: careful" in text


def test_mosaic_shows_its_scale_and_orientation():
    text = html.render_figure(_report().subject_pages[0].maps[0].figure, html._Audits(), mosaic=True)
    assert "<span>L</span>" in text and "<span>R</span>" in text
    assert "-7.00" in text and "3.10" in text and "linear-gradient" in text
    assert "z = -20, 0, 20 mm" in text
