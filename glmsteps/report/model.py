"""What the report pages show, as frozen dataclasses (no file access, no HTML).

:mod:`glmsteps.report.collect` fills these from the study's files;
:mod:`glmsteps.report.html` renders them. Every ``href`` is relative to the
page that shows it (the report folder), so the pages open from disk.
"""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True)
class FileLink:
    """A file the report links to, with its lineage and audit chain.

    Attributes
    ----------
    label : str
        Link text (e.g. ``z.nii.gz``).
    href : str
        Relative to the report folder.
    lineage_hash : str
        Full lineage hash of the file's record (``""`` if it has none).
    audit_href : str
        Relative link to the plain-words audit chain (text file), ``""`` if none.
    audit_text : str
        The audit chain (as ``glmsteps audit`` prints it), embedded in the page.
    """

    label: str
    href: str
    lineage_hash: str = ""
    audit_href: str = ""
    audit_text: str = ""


@dataclass(frozen=True)
class Figure:
    """An image on a page.

    Attributes
    ----------
    src : str
        Relative to the report folder.
    alt : str
        Text alternative.
    caption : str
        Plain text under the figure.
    source : FileLink or None
        The file the figure shows (the map, design or confounds table).
    scale : tuple or None
        Colour scale of a mosaic: ``(vmin, vmax, signed)``.
    slice_mm : tuple of float
        World z of a mosaic's slices.
    """

    src: str
    alt: str
    caption: str = ""
    source: FileLink | None = None
    scale: tuple[float, float, bool] | None = None
    slice_mm: tuple[float, ...] = ()


@dataclass(frozen=True)
class Table:
    """A small table: a header and rows of already formatted cells.

    ``flags`` marks cells (row, column) shown as outliers.
    """

    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    caption: str = ""
    source: FileLink | None = None
    flags: frozenset[tuple[int, int]] = frozenset()
    row_links: tuple[str, ...] = ()


@dataclass(frozen=True)
class RunQc:
    """One run's QC numbers and flags.

    Attributes
    ----------
    subject, session, task, run, run_id, site : str
    excluded : bool
    reason : str
        Why the run was excluded (empty when kept).
    values : dict
        QC measure -> value (NaN when not available): ``censored_fraction``,
        ``motion_mean``, ``motion_max``, ``mean_signal``, ``tsnr``, ``ar_median``.
    ar_quantiles : tuple of float
        Lag-1 AR coefficient quantiles (5, 25, 50, 75, 95 %).
    efficiency : dict
        Contrast name -> design efficiency (NaN when not estimable).
    flags : frozenset of str
        QC measures (and ``efficiency:<contrast>``) flagged by the outlier rule.
    motion_source : str
        Where the motion numbers come from.
    fit_lineage : str
        Lineage hash of the run's fit (the QC numbers come from it).
    """

    subject: str
    session: str
    task: str
    run: str
    run_id: str
    site: str
    excluded: bool
    reason: str
    values: dict[str, float]
    ar_quantiles: tuple[float, ...]
    efficiency: dict[str, float]
    flags: frozenset[str] = frozenset()
    motion_source: str = ""
    fit_lineage: str = ""


@dataclass(frozen=True)
class RunSection:
    """A run on its subject's page."""

    qc: RunQc
    figures: tuple[Figure, ...]
    links: tuple[FileLink, ...]
    warnings: tuple[str, ...]


@dataclass(frozen=True)
class MapSection:
    """One contrast map (subject or group level) with its figure and tables.

    Attributes
    ----------
    anchor : str
        HTML id of the section.
    title : str
    summary : str
        One line (threshold, clusters, subjects).
    figure : Figure or None
        The slice mosaic.
    tables : tuple of Table
        Cluster tables, site effects.
    extra_figures : tuple of Figure
        E.g. the group step's site figure.
    links : tuple of FileLink
        Every map of the contrast.
    notes : tuple of str
        Exclusions, runs left out.
    warnings : tuple of str
    """

    anchor: str
    title: str
    summary: str
    figure: Figure | None
    tables: tuple[Table, ...] = ()
    extra_figures: tuple[Figure, ...] = ()
    links: tuple[FileLink, ...] = ()
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()


@dataclass(frozen=True)
class ModelSection:
    """A group model: its contrasts' sections."""

    anchor: str
    name: str
    description: str
    sections: tuple[MapSection, ...]


@dataclass(frozen=True)
class ContrastInfo:
    """A first-level contrast: its definition and where its maps are."""

    anchor: str
    name: str
    kind: str
    definition: str
    efficiency: str
    group_anchors: tuple[tuple[str, str], ...]
    status: str


@dataclass(frozen=True)
class SettingsRow:
    """A step's settings: one row per distinct params hash."""

    step: str
    used_by: str
    params_hash: str
    settings: tuple[str, ...]


@dataclass(frozen=True)
class SubjectPage:
    """Everything on one subject's page."""

    subject: str
    site: str
    filename: str
    runs: tuple[RunSection, ...]
    maps: tuple[MapSection, ...]
    warnings: tuple[str, ...]


@dataclass(frozen=True)
class Report:
    """Everything on the study page, and the subject pages."""

    title: str
    glmsteps_version: str
    results_label: str
    index: FileLink
    subjects: tuple[str, ...]
    sites: dict[str, int]
    runs: tuple[RunQc, ...]
    contrasts: tuple[ContrastInfo, ...]
    settings: tuple[SettingsRow, ...]
    qc_figures: tuple[Figure, ...]
    qc_measures: tuple[tuple[str, str], ...]
    outlier_rule: str
    tsnr_definition: str
    models: tuple[ModelSection, ...]
    subject_pages: tuple[SubjectPage, ...]
    excluded_subjects: tuple[str, ...] = ()
    skipped: tuple[str, ...] = ()
    warnings_by_step: dict[str, int] = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    qc_table: FileLink | None = None
