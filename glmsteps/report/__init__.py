"""The study report: one HTML page for the study and one per subject.

Modules
-------
qc
    Pure QC numbers: temporal SNR, AR coefficient summaries, motion summaries
    and the outlier rule (arrays and tables in, arrays and tables out).
tables
    Pure assembly of the report's tables from records already read (the run
    QC table, settings summary, cluster tables with tolerant column lookup,
    site effects).
mosaic
    (in :mod:`glmsteps.plots.mosaic`) the slice-mosaic image.
figures
    The QC figures of the study page (matplotlib, house style).
html
    Pure HTML rendering of the pages from a :class:`~glmsteps.report.model.Report`.
model
    Frozen dataclasses that describe what the pages show.
cache
    The figure cache: a figure is keyed by the lineage hash of what it shows
    and drawn only when no file for that key exists.
collect
    The file layer: discovers maps through ``index.tsv`` and sidecars and
    reads everything the pages show.
summary
    The end-of-run terminal summary (called from the Snakefile).
"""
