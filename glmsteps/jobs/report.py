"""Step ``report``: the study page and one page per subject (``results/report/``).

inputs (named; lists may be empty)
    ``index`` (index.tsv), ``participants`` (list: the participants table, if
    any), per run: ``fit``, ``mean``, ``ar_coef``, ``confounds_summary``,
    ``design_summary``, ``design_figure``, ``correlation_figure``,
    ``confounds_figure``; ``thresholded`` and ``clusters`` (subject and group
    thresholds), ``site_qc``, ``site_figure``, ``permutation_clusters``. Lists
    need not be in any order: files are matched to runs and maps by their
    records (:mod:`glmsteps.report.collect`).
params
    ``site_column``, ``outlier_mads``, ``min_site_runs``, ``min_relative_spread``, ``mosaic_slices``,
    ``mosaic_columns`` (config section ``report``).
outputs
    ``study`` (``index.html``), ``subject_pages`` (list, ``sub-<label>.html``), ``qc_table``
    (``qc_runs.tsv``: every run's QC numbers and flags, with its fit's lineage hash).

The figures, audit texts and QC numbers live in ``figures/``, ``audit/`` and
``qc/`` beside the pages: a cache keyed by lineage hashes that is not a
declared output, so a rerun reuses every figure whose map did not change.
The sidecar ``index.json`` records what was drawn and reused.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from .. import provenance
from ..errors import ConfigError
from ..fileio import write_text, write_tsv
from ..report.collect import ReportSources, collect_report, report_facts
from ..report.html import render_study_page, render_subject_page
from ..report.tables import run_qc_frame
from ..settings import ReportSettings

STEP = "report"
logger = logging.getLogger("glmsteps")


def _list(inputs: Mapping[str, Any], key: str) -> tuple[str, ...]:
    value = inputs.get(key, [])
    if isinstance(value, (str, os.PathLike)):
        return (os.fspath(value),)
    return tuple(os.fspath(v) for v in value)


def sources_from(inputs: Mapping[str, Any]) -> ReportSources:
    """The rule's named inputs as :class:`ReportSources`."""
    if "index" not in inputs:
        raise ConfigError("rule report: input 'index' (index.tsv) is missing; name it index")
    participants = _list(inputs, "participants")
    return ReportSources(
        index=os.fspath(inputs["index"]), participants=participants[0] if participants else "",
        fits=_list(inputs, "fit"), means=_list(inputs, "mean"), ar_coefs=_list(inputs, "ar_coef"),
        confounds_summaries=_list(inputs, "confounds_summary"), design_summaries=_list(inputs, "design_summary"),
        design_figures=_list(inputs, "design_figure"), correlation_figures=_list(inputs, "correlation_figure"),
        confounds_figures=_list(inputs, "confounds_figure"), thresholded=_list(inputs, "thresholded"),
        clusters=_list(inputs, "clusters"), site_qc=_list(inputs, "site_qc"), site_figures=_list(inputs, "site_figure"),
        permutation_clusters=_list(inputs, "permutation_clusters"))


def run(inputs: Mapping[str, Any], outputs: Mapping[str, Any], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Write the report pages (see the module docstring)."""
    settings = ReportSettings.from_params(params)
    for key in ("study", "qc_table"):
        if key not in outputs:
            raise ConfigError(f"rule report: output {key!r} is missing; name the outputs study, subject_pages, qc_table")
    sources = sources_from(inputs)
    study = Path(os.fspath(outputs["study"]))
    pages = {Path(p).name: Path(p) for p in _list(outputs, "subject_pages")}
    with provenance.collect_warnings() as seen:
        qc_table = Path(os.fspath(outputs["qc_table"]))
        report, caches = collect_report(sources, settings, study.parent, root=os.getcwd(),
                                        qc_table=os.path.relpath(qc_table, study.parent))
    record = provenance.build_record(STEP, params, {"index": sources.index}, warnings_seen=seen,
                                     **report_facts(report, caches))
    provenance.write_sidecar(study, record)
    written = set()
    for subject in report.subject_pages:
        target = pages.get(subject.filename)
        if target is None:
            logger.warning("report: no output declared for %s; its page is not written", subject.filename)
            continue
        write_text(target, render_subject_page(report, subject))
        written.add(subject.filename)
    for name, target in pages.items():
        if name not in written:  # a declared page without data (e.g. a subject with no run left)
            write_text(target, f"<!DOCTYPE html>\n<html><body><p>No data for {name}.</p>"
                               '<p><a href="index.html">study page</a></p></body></html>\n')
    write_tsv(qc_table, run_qc_frame(report.runs, [k for k, _ in report.qc_measures]))
    write_text(study, render_study_page(report))
    removed = [c.prune() for c in (caches.figures, caches.audit, caches.numbers)]
    logger.info("report: %d figure(s) drawn, %d copied, %d reused; %d audit text(s) written; %d stale cache file(s) "
                "removed; %s", len(caches.figures.drawn), len(caches.figures.copied), len(caches.figures.reused),
                len(caches.audit.written), sum(len(r) for r in removed), study)
