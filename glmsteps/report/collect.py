"""The report's file layer: find what the pages show and read it.

Maps are discovered through ``index.tsv`` and the sidecars, never through
file names: every index row names a map, its level, subject, contrast and
lineage hash. The other files the report reads (per-run summaries, figures,
thresholded maps, cluster tables, site QC) are given as lists, and each is
matched to the map or run it belongs to by its record:

* files written by one job share its record, hence its lineage hash (a z map
  and its ``site_qc.json``; ``fit.h5`` and ``mean.nii.gz``; ``design.json``
  and ``design.png``);
* a file made from a map records that map's lineage hash among its inputs (a
  thresholded map names its z map; a fit names its design summary, a design
  its confounds summary).

Recorded input paths are resolved against the folder the workflow ran in (the
job's working folder), as ``glmsteps audit`` does.
"""

from __future__ import annotations

import json
import logging
import math
import os
import re
from collections import defaultdict
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .. import __version__, audit
from ..provenance import sidecar_path
from ..settings import ReportSettings
from . import qc, tables
from .cache import FileCache, cache_key
from .model import (ContrastInfo, Figure, FileLink, MapSection, ModelSection, Report, RunQc, RunSection,
                    SettingsRow, SubjectPage, Table)

logger = logging.getLogger("glmsteps")

#: QC measures of a run: key -> (label, unit).
QC_MEASURES: dict[str, tuple[str, str]] = {
    "censored_fraction": ("censored fraction", ""),
    "motion_mean": ("motion, mean", "mm"),
    "motion_max": ("motion, largest", "mm"),
    "mean_signal": ("mean signal", "image units"),
    "tsnr": ("temporal SNR (median)", ""),
    "ar_median": ("lag-1 AR coefficient (median)", ""),
}
#: The side on which each QC measure is bad (the outlier rule flags only that side).
QC_DIRECTIONS: dict[str, str] = {"censored_fraction": "high", "motion_mean": "high", "motion_max": "high",
                                 "mean_signal": "both", "tsnr": "low", "ar_median": "both", "efficiency": "low"}
#: Display cut of a z map drawn without a threshold setting (not a test).
DISPLAY_Z = 3.09
_ENTITY = {key: re.compile(rf"(?:^|[_/]){key}-([A-Za-z0-9]+)") for key in ("sub", "ses", "task", "run")}


@dataclass(frozen=True)
class ReportSources:
    """The files the report job reads (its rule's named inputs).

    Per-run lists need not be in any order; they are matched by lineage.
    ``thresholded`` and ``clusters`` hold every subject- and group-level
    threshold output the pages show.
    """

    index: str
    participants: str = ""
    fits: tuple[str, ...] = ()
    means: tuple[str, ...] = ()
    ar_coefs: tuple[str, ...] = ()
    confounds_summaries: tuple[str, ...] = ()
    design_summaries: tuple[str, ...] = ()
    design_figures: tuple[str, ...] = ()
    correlation_figures: tuple[str, ...] = ()
    confounds_figures: tuple[str, ...] = ()
    thresholded: tuple[str, ...] = ()
    clusters: tuple[str, ...] = ()
    site_qc: tuple[str, ...] = ()
    site_figures: tuple[str, ...] = ()
    permutation_clusters: tuple[str, ...] = ()


@dataclass
class Caches:
    """The three cache folders of a report."""

    figures: FileCache
    audit: FileCache
    numbers: FileCache

    @classmethod
    def under(cls, report_dir: str | os.PathLike[str]) -> Caches:
        base = Path(report_dir)
        return cls(FileCache(base / "figures"), FileCache(base / "audit"), FileCache(base / "qc"))


# ----------------------------------------------------------------------------
# records
# ----------------------------------------------------------------------------

class Records:
    """Provenance records read once each (by resolved path).

    Parameters
    ----------
    root : path-like
        Folder recorded relative paths resolve against (the workflow's working folder).
    """

    def __init__(self, root: str | os.PathLike[str]) -> None:
        self.root = Path(root)
        self._cache: dict[str, dict[str, Any] | None] = {}
        self._raw: dict[str, dict[str, Any] | None] = {}

    def resolve(self, recorded: str) -> Path:
        """A recorded path on disk."""
        return audit.resolve_recorded(recorded, self.root)

    def of(self, path: str | os.PathLike[str]) -> dict[str, Any] | None:
        """The record of a file (sidecar, JSON output or HDF5 attribute), ``None`` if it has none."""
        key = os.path.abspath(os.fspath(path))
        if key not in self._cache:
            try:
                self._cache[key] = audit.load_record_from_disk(key)
            except Exception as exc:  # a broken sidecar is shown as missing, not a failed report
                logger.warning("report: cannot read the record of %s (%s)", path, exc)
                self._cache[key] = None
        return self._cache[key]

    def sidecar(self, path: str | os.PathLike[str]) -> dict[str, Any]:
        """The whole sidecar of a file (record plus step fields such as ``map``), ``{}`` if none."""
        side = os.path.abspath(os.fspath(sidecar_path(path)))
        if side not in self._raw:
            try:
                with open(side, encoding="utf-8") as handle:
                    data = json.load(handle)
                self._raw[side] = data if isinstance(data, dict) else {}
            except (OSError, json.JSONDecodeError):
                self._raw[side] = {}
        return self._raw[side] or {}

    def recorded(self, path: str | os.PathLike[str]) -> str:
        """The path as records name it: relative to the root folder when below it."""
        p = Path(os.path.abspath(os.fspath(path)))
        try:
            return str(p.relative_to(self.root.resolve()))
        except ValueError:
            return str(p)

    def loader(self, recorded_path: str) -> Mapping[str, Any] | None:
        """Record loader for :func:`glmsteps.audit.build_chain`."""
        return self.of(self.resolve(recorded_path))


def lineage_of(record: Mapping[str, Any] | None) -> str:
    return str(record.get("lineage_hash", "")) if record else ""


def input_lineage(record: Mapping[str, Any] | None, name: str) -> str:
    """Lineage hash a record names for one of its (single) inputs, ``""`` if none."""
    desc = (record or {}).get("inputs", {}).get(name)
    return str(desc.get("lineage_hash", "")) if isinstance(desc, Mapping) else ""


def input_path(record: Mapping[str, Any] | None, name: str) -> str:
    """Recorded path of one of a record's (single) inputs, ``""`` if none."""
    desc = (record or {}).get("inputs", {}).get(name)
    return str(desc.get("path", "")) if isinstance(desc, Mapping) else ""


def _by_lineage(records: Records, paths: Sequence[str]) -> dict[str, list[str]]:
    out: dict[str, list[str]] = defaultdict(list)
    for p in paths:
        out[lineage_of(records.of(p))].append(p)
    return out


def _finite(x: Any) -> float:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return float("nan")
    return v if math.isfinite(v) else float("nan")


# ----------------------------------------------------------------------------
# links and audit chains
# ----------------------------------------------------------------------------

class Linker:
    """Makes :class:`FileLink` objects: hrefs relative to the report folder, cached audit chains."""

    def __init__(self, records: Records, report_dir: str | os.PathLike[str], audit_cache: FileCache) -> None:
        self.records = records
        self.report_dir = Path(os.path.abspath(os.fspath(report_dir)))
        self.cache = audit_cache

    def href(self, path: str | os.PathLike[str]) -> str:
        return Path(os.path.relpath(os.path.abspath(os.fspath(path)), self.report_dir)).as_posix()

    def audit_text(self, path: str | os.PathLike[str]) -> tuple[str, str]:
        """(href of the audit text file, text) of a file with a record; ``("", "")`` otherwise."""
        record = self.records.of(path)
        if not record:
            return "", ""
        target = self.records.recorded(path)
        name = cache_key("audit", {"path": target, "lineage": lineage_of(record), "form": "summary"}) + ".txt"

        def make() -> str:
            chain = audit.build_chain(target, record, self.records.loader, str(self.records.root))
            return audit.render_summary(chain)    # what `glmsteps audit` prints by default

        try:
            file, text = self.cache.text(name, make)
        except Exception as exc:  # an unreadable chain is reported on the page, not fatal
            logger.warning("report: no audit chain for %s (%s)", path, exc)
            return "", f"audit chain not available: {exc}"
        return self.href(file), text

    def link(self, path: str | os.PathLike[str], label: str | None = None, with_audit: bool = True) -> FileLink:
        record = self.records.of(path)
        audit_href, text = self.audit_text(path) if with_audit else ("", "")
        return FileLink(label=label or Path(path).name, href=self.href(path), lineage_hash=lineage_of(record),
                        audit_href=audit_href, audit_text=text)


# ----------------------------------------------------------------------------
# the index
# ----------------------------------------------------------------------------

@dataclass(frozen=True)
class IndexRow:
    """One row of ``index.tsv`` with the map's path on disk."""

    level: str
    subject: str
    session: str
    task: str
    run: str
    contrast: str
    stat: str
    path: str
    status: str
    params_hash: str
    lineage_hash: str


def read_index(path: str | os.PathLike[str]) -> list[IndexRow]:
    """Rows of ``index.tsv`` (paths made relative to the working folder's view of it).

    Columns are looked up by name; a missing optional column reads as empty.
    """
    import pandas as pd

    frame = pd.read_csv(path, sep="\t", dtype=str, keep_default_na=False, na_values=[])
    base = Path(path).parent
    rows = []
    for rec in frame.to_dict(orient="records"):
        get = lambda k: str(rec.get(k, "") or "")  # noqa: E731
        if get("path") in ("", "n/a"):
            continue
        rows.append(IndexRow(level=get("level"), subject=get("subject"), session=get("session").replace("n/a", ""),
                             task=get("task").replace("n/a", ""), run=get("run").replace("n/a", ""),
                             contrast=get("contrast"), stat=get("stat"), path=os.fspath(base / get("path")),
                             status=get("status") or "ok", params_hash=get("params_hash"),
                             lineage_hash=get("lineage_hash")))
    return rows


def read_sites(participants: str, column: str) -> tuple[dict[str, str], str]:
    """Subject label -> site from the participants table, and a note when there is none."""
    if not participants or not os.path.isfile(participants):
        return {}, "no participants table: all runs count as one site"
    from ..errors import GroupError
    from ..fileio import read_user_tsv

    table = read_user_tsv(participants, GroupError, "save it as a BIDS participants table")
    if "participant_id" not in table.columns or column not in table.columns:
        return {}, (f"{participants}: no column {column!r} (config report.site_column): all runs count as one site")
    sites = {}
    for pid, site in zip(table["participant_id"].astype(str), table[column]):
        label = pid[4:] if pid.startswith("sub-") else pid
        sites[label] = "n/a" if site is None or (isinstance(site, float) and math.isnan(site)) else str(site)
    return sites, ""


# ----------------------------------------------------------------------------
# runs
# ----------------------------------------------------------------------------

@dataclass
class RunFiles:
    """The files of one run, matched by lineage."""

    fit: str
    fit_record: dict[str, Any]
    subject: str
    session: str
    task: str
    run: str
    mean: str = ""
    ar_coef: str = ""
    design: str = ""
    confounds: str = ""
    events: str = ""
    design_figure: str = ""
    correlation_figure: str = ""
    confounds_figure: str = ""

    @property
    def run_id(self) -> str:
        return "_".join(([f"ses-{self.session}"] if self.session else []) + [f"task-{self.task}", f"run-{self.run}"])

    @property
    def label(self) -> str:
        return f"{self.subject} {self.run_id}"


def _entities(text: str) -> dict[str, str]:
    name = os.path.basename(text)
    return {k: (m.group(1) if (m := rx.search(name)) else "") for k, rx in _ENTITY.items()}


def match_runs(records: Records, sources: ReportSources) -> list[RunFiles]:
    """Every run of the study with its files (sorted by subject, session, task, run)."""
    means = _by_lineage(records, sources.means)
    ar_coefs = _by_lineage(records, sources.ar_coefs)
    designs = _by_lineage(records, sources.design_summaries)
    confounds = _by_lineage(records, sources.confounds_summaries)
    design_figs = _by_lineage(records, sources.design_figures)
    corr_figs = _by_lineage(records, sources.correlation_figures)
    conf_figs = _by_lineage(records, sources.confounds_figures)
    runs = []
    for fit in sources.fits:
        record = records.of(fit) or {}
        lin = lineage_of(record)
        mean = (means.get(lin) or [""])[0]
        block = records.sidecar(mean).get("map") if mean else None
        if isinstance(block, Mapping) and block.get("subject"):
            ent = {"sub": str(block.get("subject") or ""), "ses": str(block.get("session") or ""),
                   "task": str(block.get("task") or ""), "run": str(block.get("run") or "")}
        else:
            ent = _entities(input_path(record, "bold"))
        design = (designs.get(input_lineage(record, "design_summary")) or [""])[0]
        design_record = records.of(design) if design else None
        conf = (confounds.get(input_lineage(design_record, "confounds_summary")) or [""])[0]
        d_lin = lineage_of(design_record)
        events = input_path(design_record, "events")
        runs.append(RunFiles(
            fit=fit, fit_record=record, subject=ent["sub"], session=ent["ses"], task=ent["task"], run=ent["run"],
            mean=mean, ar_coef=(ar_coefs.get(lin) or [""])[0], design=design, confounds=conf,
            events=os.fspath(records.resolve(events)) if events else "",
            design_figure=(design_figs.get(d_lin) or [""])[0], correlation_figure=(corr_figs.get(d_lin) or [""])[0],
            confounds_figure=(conf_figs.get(lineage_of(records.of(conf)) if conf else "") or [""])[0]))
    return sorted(runs, key=lambda r: (r.subject, r.session, r.task, r.run))


def _motion_from_block(block: Any) -> tuple[float, float, str] | None:
    """(mean, max, description) from a ``motion`` block of confounds.json, whatever its key names."""
    if not isinstance(block, Mapping):
        return None
    flat = {k: v for k, v in audit.flatten_params(block).items() if isinstance(v, (int, float)) and not isinstance(v, bool)}
    mean_key = next((k for k in flat if "mean" in k.lower()), None)
    max_key = next((k for k in flat if "max" in k.lower() or "largest" in k.lower()), None)
    if mean_key is None and max_key is None:
        return None
    return (_finite(flat.get(mean_key)) if mean_key else float("nan"),
            _finite(flat.get(max_key)) if max_key else float("nan"),
            f"confounds.json motion block ({', '.join(k for k in (mean_key, max_key) if k)})")


def _motion_from_raw(records: Records, confounds_record: Mapping[str, Any]) -> tuple[float, float, str]:
    """Mean and largest value of the censoring column of the raw confounds table."""
    from ..fileio import read_tsv

    raw = input_path(confounds_record, "confounds")
    params = confounds_record.get("params") or {}
    censor = params.get("censor") if isinstance(params, Mapping) else None
    column = censor.get("column") if isinstance(censor, Mapping) else None
    path = records.resolve(raw) if raw else None
    if path is None or not path.is_file():
        return float("nan"), float("nan"), "no motion measure found"
    table = read_tsv(path)
    if not column or column not in table.columns:
        column = next((c for c in table.columns if re.search(r"(framewise|displacement|^fd)", str(c).lower())), None)
    if column is None:
        return float("nan"), float("nan"), "no motion measure found"
    m = qc.motion_summary(table[column].to_numpy(dtype=np.float64))
    return m["mean"], m["max"], f"column {column} of the raw confounds table"


def run_numbers(records: Records, run: RunFiles, definitions: Mapping[str, Mapping[str, Any]],
                cache: FileCache) -> dict[str, Any]:
    """A run's QC numbers (cached by the fit's lineage; efficiencies added per contrast definition)."""
    lin = lineage_of(run.fit_record)
    name = cache_key("run-qc", {"fit": lin, "ar_coef": lineage_of(records.of(run.ar_coef)) if run.ar_coef else ""}) \
        + ".json"
    path = cache.path(name)
    data: dict[str, Any] = {}
    if path.is_file():
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError):
            data = {}
    wanted = {n: cache_key("definition", d) for n, d in definitions.items()}
    have = data.get("efficiency", {})
    missing = {n: k for n, k in wanted.items() if k not in have}
    if "signal" in data and not missing:
        cache.keep(name)
        return data
    fit = None
    excluded = bool(run.fit_record.get("excluded"))
    if "signal" not in data:
        data["signal"] = _signal_numbers(records, run, excluded)
        fit = data["signal"].pop("_fit", None)
    if missing:
        data.setdefault("efficiency", {}).update(_efficiencies(run, definitions, missing, excluded, fit))
    from ..fileio import write_json

    cache.folder.mkdir(parents=True, exist_ok=True)
    write_json(path, data)
    cache.record_written(name)
    return data


def _signal_numbers(records: Records, run: RunFiles, excluded: bool) -> dict[str, Any]:
    conf = records.of(run.confounds) if run.confounds else None
    conf_side = records.sidecar(run.confounds) if run.confounds else {}
    motion = _motion_from_block(conf_side.get("motion"))
    if motion is None:
        motion = _motion_from_raw(records, conf) if conf else (float("nan"), float("nan"), "no confounds summary")
    out: dict[str, Any] = {
        "censored_fraction": _finite(conf_side.get("censored_fraction")),
        "excluded": bool(conf_side.get("excluded")) or excluded,
        "reason": str(conf_side.get("exclusion_reason") or ("excluded upstream" if excluded else "")),
        "motion_mean": motion[0], "motion_max": motion[1], "motion_source": motion[2],
        "mean_signal": float("nan"), "tsnr": float("nan"), "ar_quantiles": [float("nan")] * 5, "n_voxels": 0,
    }
    if excluded:
        return out
    from ..fitstore import read_fit

    fit = read_fit(run.fit)
    m = np.asarray(fit.mean_image, dtype=np.float64).ravel()[fit.voxel_index]
    params = run.fit_record.get("params") or {}
    scaling = str(fit.attrs.get("scaling") or params.get("scaling") or "percent")
    factors = qc.scale_factors(m, scaling, float(params.get("grand_mean_value", 100.0)))  # type: ignore[arg-type]
    model = str(fit.attrs.get("autocorrelation") or params.get("autocorrelation") or "ols")
    ratio = qc.innovation_ratio(model, fit.ar_coef, fit.bin_rho, fit.bin)  # type: ignore[arg-type]
    tsnr = qc.temporal_snr(m, fit.residual_variance, factors, ratio)
    if run.ar_coef:
        from ..maps import load_map

        lag1 = np.asarray(load_map(run.ar_coef)[0], dtype=np.float64).ravel()[fit.voxel_index]
    else:
        lag1 = np.asarray(fit.ar_coef, dtype=np.float64)[:, 0]
    summary = qc.summarise_run_signal(m, tsnr, lag1)
    out.update(mean_signal=summary.mean_signal, tsnr=summary.tsnr_median, ar_quantiles=list(summary.ar_quantiles),
               n_voxels=summary.n_voxels, _fit=fit)
    return out


def _efficiencies(run: RunFiles, definitions: Mapping[str, Mapping[str, Any]], missing: Mapping[str, str],
                  excluded: bool, fit: Any) -> dict[str, float | None]:
    from ..contrasts import contrast_matrix, efficiency, estimability, parse_spec
    from ..errors import GlmstepsError

    out: dict[str, float | None] = {}
    if excluded:
        return {key: None for key in missing.values()}
    if fit is None:
        from ..fitstore import read_fit

        fit = read_fit(run.fit)
    X = np.asarray(fit.design, dtype=np.float64)
    for name, key in missing.items():
        try:
            spec = parse_spec(name, definitions[name])
            C = contrast_matrix(spec, list(fit.names), list(fit.conditions), list(fit.basis))
            if not estimability(X, C, list(fit.names), list(fit.conditions)).estimable:
                out[key] = None
                continue
            value = efficiency(X, C)
            out[key] = value if math.isfinite(value) else None
        except GlmstepsError:
            out[key] = None
    return out


# ----------------------------------------------------------------------------
# figures
# ----------------------------------------------------------------------------

def _rounded(values: Sequence[float]) -> list[float | None]:
    return [float(f"{v:.6g}") if math.isfinite(v) else None for v in values]


def mosaic_figure(caches: Caches, linker: Linker, overlay: str, underlay: str, settings: ReportSettings,
                  caption: str, vmin: float | None = None, source_label: str | None = None) -> Figure:
    """The slice mosaic of a map over its underlay, drawn only when no cached file has its lineage."""
    records = linker.records
    key = cache_key("mosaic", {"overlay": lineage_of(records.of(overlay)) or linker.records.recorded(overlay),
                               "underlay": lineage_of(records.of(underlay)) or linker.records.recorded(underlay),
                               "vmin": vmin, "slices": settings.mosaic_slices, "columns": settings.mosaic_columns})

    def draw(target: Path) -> dict[str, Any]:
        from ..maps import load_map
        from ..plots.mosaic import compose_mosaic, save_png

        over, affine = load_map(overlay)
        under, _ = load_map(underlay)
        mosaic = compose_mosaic(under, over, affine, settings.mosaic_slices, settings.mosaic_columns, vmin=vmin)
        save_png(target, mosaic.rgb)
        return {"slice_mm": list(mosaic.slice_mm), "vmin": None if math.isnan(mosaic.vmin) else mosaic.vmin,
                "vmax": None if math.isnan(mosaic.vmax) else mosaic.vmax, "signed": mosaic.signed,
                "n_coloured": mosaic.n_coloured, "width": int(mosaic.rgb.shape[1]),
                "height": int(mosaic.rgb.shape[0])}

    file, meta = caches.figures.figure_with_meta(f"mosaic-{key}.png", draw)
    scale = None
    if meta.get("vmin") is not None and meta.get("vmax") is not None:
        scale = (float(meta["vmin"]), float(meta["vmax"]), bool(meta.get("signed")))
    return Figure(src=linker.href(file), alt=f"slice mosaic of {Path(overlay).name}", caption=caption,
                  source=linker.link(overlay, source_label), scale=scale,
                  slice_mm=tuple(float(x) for x in meta.get("slice_mm", [])))


def copied_figure(caches: Caches, linker: Linker, image: str, source: str, caption: str) -> Figure | None:
    """An existing PNG of a step, copied into the cache by its lineage (never redrawn)."""
    if not image or not os.path.isfile(image):
        return None
    lin = lineage_of(linker.records.of(image))
    key = cache_key("copy", {"lineage": lin or linker.records.recorded(image), "name": Path(image).name})
    file = caches.figures.copy(f"{Path(image).stem}-{key}.png", image)
    return Figure(src=linker.href(file), alt=caption, caption=caption, source=linker.link(source))


# ----------------------------------------------------------------------------
# the whole report
# ----------------------------------------------------------------------------

def _definitions(records: Records, rows: Sequence[IndexRow]) -> dict[str, dict[str, Any]]:
    """Contrast name -> definition, from the first run- or subject-level map of each contrast."""
    out: dict[str, dict[str, Any]] = {}
    for row in rows:
        if row.level not in ("run", "subject") or not row.contrast or row.contrast in out:
            continue
        params = (records.of(row.path) or {}).get("params") or {}
        definition = params.get("definition")
        if isinstance(definition, Mapping):
            out[row.contrast] = dict(definition)
    return out


def _warnings_of(record: Mapping[str, Any] | None) -> list[str]:
    return [str(w) for w in (record or {}).get("warnings") or []]


class _Warnings:
    """Warnings of the records read, once per job (step and lineage)."""

    def __init__(self) -> None:
        self.seen: set[tuple[str, str]] = set()
        self.by_step: dict[str, int] = defaultdict(int)

    def take(self, record: Mapping[str, Any] | None, where: str) -> list[str]:
        if not record:
            return []
        step = str(record.get("step", "?"))
        job = (step, lineage_of(record))
        messages = _warnings_of(record)
        if job in self.seen:
            return []
        self.seen.add(job)
        self.by_step.setdefault(step, 0)
        self.by_step[step] += len(messages)
        return [f"{step} ({where}): {m}" for m in messages]


def collect_report(sources: ReportSources, settings: ReportSettings, report_dir: str | os.PathLike[str],
                   root: str | os.PathLike[str] | None = None, caches: Caches | None = None,
                   subject_filename: Callable[[str], str] = lambda s: f"sub-{s}.html",
                   qc_table: str = "qc_runs.tsv") -> tuple[Report, Caches]:
    """Read the study and build the :class:`Report` the pages show.

    Parameters
    ----------
    sources : ReportSources
    settings : ReportSettings
    report_dir : path-like
        Folder of the pages (hrefs are relative to it; the caches live below it).
    root : path-like, optional
        Folder the workflow ran in (default: the current folder).
    caches : Caches, optional
        Default: ``figures/``, ``audit/`` and ``qc/`` below ``report_dir``.
    subject_filename : callable
        Subject label -> page file name.
    qc_table : str
        Name of the QC table beside the pages (the QC figures link to it).

    Returns
    -------
    (Report, Caches)
    """
    records = Records(root if root is not None else os.getcwd())
    caches = caches or Caches.under(report_dir)
    linker = Linker(records, report_dir, caches.audit)
    warn = _Warnings()
    rows = read_index(sources.index)
    definitions = _definitions(records, rows)
    sites, site_note = read_sites(sources.participants, settings.site_column)
    runs = match_runs(records, sources)
    subjects = sorted({r.subject for r in runs} | {row.subject for row in rows if row.subject})

    # ---- run QC --------------------------------------------------------------------------------
    numbers = [run_numbers(records, r, definitions, caches.numbers) for r in runs]
    site_of_run = [sites.get(r.subject, "all" if not sites else "n/a") for r in runs]
    values = {key: [] for key in QC_MEASURES}  # type: dict[str, list[float]]
    for n in numbers:
        s = n["signal"]
        values["censored_fraction"].append(_finite(s.get("censored_fraction")))
        values["motion_mean"].append(_finite(s.get("motion_mean")))
        values["motion_max"].append(_finite(s.get("motion_max")))
        values["mean_signal"].append(_finite(s.get("mean_signal")))
        values["tsnr"].append(_finite(s.get("tsnr")))
        values["ar_median"].append(_finite((s.get("ar_quantiles") or [math.nan] * 5)[2]))
    def flagged(v: Sequence[float], direction: str) -> np.ndarray:
        return qc.flag_outliers(v, site_of_run, settings.outlier_mads, settings.min_site_runs,
                                direction, settings.min_relative_spread)  # type: ignore[arg-type]

    flags = {key: flagged(v, QC_DIRECTIONS[key]) for key, v in values.items()}
    contrast_names = sorted(definitions)
    eff_values = {c: [_finite((n.get("efficiency") or {}).get(cache_key("definition", definitions[c])))
                      for n in numbers] for c in contrast_names}
    eff_flags = {c: flagged(v, QC_DIRECTIONS["efficiency"]) for c, v in eff_values.items()}
    run_qcs = []
    for i, (r, n) in enumerate(zip(runs, numbers)):
        s = n["signal"]
        flagged = {k for k in QC_MEASURES if flags[k][i]} | {f"efficiency:{c}" for c in contrast_names if eff_flags[c][i]}
        run_qcs.append(RunQc(subject=r.subject, session=r.session, task=r.task, run=r.run, run_id=r.run_id,
                             site=site_of_run[i], excluded=bool(s.get("excluded")), reason=str(s.get("reason") or ""),
                             values={k: values[k][i] for k in QC_MEASURES},
                             ar_quantiles=tuple(_finite(x) for x in s.get("ar_quantiles") or [math.nan] * 5),
                             efficiency={c: eff_values[c][i] for c in contrast_names}, flags=frozenset(flagged),
                             motion_source=str(s.get("motion_source", "")), fit_lineage=lineage_of(r.fit_record)))

    # ---- QC figures ----------------------------------------------------------------------------
    qc_figures = _qc_figures(caches, linker, run_qcs, contrast_names, qc_table)

    # ---- subject pages -------------------------------------------------------------------------
    thresholded = _threshold_outputs(records, sources)
    index_by_lineage: dict[str, list[IndexRow]] = defaultdict(list)
    for row in rows:
        index_by_lineage[row.lineage_hash].append(row)
    pages = []
    for subject in subjects:
        run_sections = []
        page_warnings: list[str] = []
        for r, rq in zip(runs, run_qcs):
            if r.subject != subject:
                continue
            run_sections.append(_run_section(records, linker, caches, r, rq, rows, warn))
        maps = _subject_maps(records, linker, caches, settings, subject, rows, thresholded, warn, runs)
        for sec in maps:
            page_warnings.extend(sec.warnings)
        for rs in run_sections:
            page_warnings.extend(rs.warnings)
        pages.append(SubjectPage(subject=subject, site=sites.get(subject, "all" if not sites else "n/a"),
                                 filename=subject_filename(subject), runs=tuple(run_sections), maps=tuple(maps),
                                 warnings=tuple(page_warnings)))

    # ---- group models --------------------------------------------------------------------------
    models, excluded_subjects = _group_models(records, linker, caches, settings, rows, thresholded, sources, warn)

    # ---- contrasts, settings, exclusions -------------------------------------------------------
    contrasts = _contrast_infos(rows, definitions, run_qcs, models)
    settings_rows = _settings_rows(records, runs, rows, thresholded)
    skipped = []
    for row in rows:
        if row.status == "skipped" and row.stat in ("z",):
            reason = (records.sidecar(row.path).get("reason") or "not estimable")
            skipped.append(f"sub-{row.subject} {row.task and 'task-' + row.task} run-{row.run} contrast {row.contrast}: "
                           f"{reason}")
    notes = tuple(n for n in (site_note,) if n)
    site_counts: dict[str, int] = defaultdict(int)
    for s in subjects:
        site_counts[sites.get(s, "all" if not sites else "n/a")] += 1
    report = Report(
        title="Study report", glmsteps_version=__version__,
        results_label=records.recorded(Path(sources.index).parent),
        index=linker.link(sources.index, "index.tsv", with_audit=False), subjects=tuple(subjects),
        sites=dict(sorted(site_counts.items())), runs=tuple(run_qcs), contrasts=tuple(contrasts),
        settings=tuple(settings_rows), qc_figures=tuple(qc_figures),
        qc_measures=tuple((k, f"{label} ({unit})" if unit else label) for k, (label, unit) in QC_MEASURES.items()),
        outlier_rule=qc.describe_outlier_rule(settings.outlier_mads, settings.min_site_runs,
                                              settings.min_relative_spread),
        tsnr_definition=TSNR_DEFINITION, models=tuple(models), subject_pages=tuple(pages),
        excluded_subjects=tuple(excluded_subjects), skipped=tuple(skipped),
        warnings_by_step=dict(sorted(warn.by_step.items())), notes=notes,
        qc_table=FileLink(label=f"{qc_table} (one row per run, with its fit's lineage hash)", href=qc_table))
    return report, caches


TSNR_DEFINITION = (
    "temporal SNR = temporal mean of the raw signal / standard deviation of the noise left after the model, in "
    "raw units: sqrt(residual variance / g) / scale factor, with g = 1 (OLS), 1 - rho^2 (AR(1), rho of the "
    "voxel's AR bin) or the product of (1 - partial autocorrelation^2) (AR(p)); the run's value is the median "
    "over its fitted voxels. With percent scaling this is 100 sqrt(g / residual variance).")


def _qc_figures(caches: Caches, linker: Linker, run_qcs: Sequence[RunQc], contrasts: Sequence[str],
                qc_table: str) -> list[Figure]:
    from . import figures

    data = FileLink(label=f"{qc_table} (one row per run, with its fit's lineage hash)", href=qc_table)

    if not run_qcs:
        return []
    labels = [f"{r.subject}/{r.run}" if not r.session else f"{r.subject}/{r.session}/{r.run}" for r in run_qcs]
    sites = [r.site for r in run_qcs]
    measures = [(label, [r.values[key] for r in run_qcs], [key in r.flags for r in run_qcs])
                for key, label in ((k, f"{lab} ({u})" if u else lab) for k, (lab, u) in QC_MEASURES.items())]
    out = []
    content = {"sites": sites, "labels": labels,
               "measures": [(t, _rounded(v), [bool(x) for x in f]) for t, v, f in measures]}
    file = caches.figures.figure(f"qc-{cache_key('qc-strips', content)}.png",
                                 lambda p: figures.plot_qc_strips(p, sites, labels, measures))
    out.append(Figure(src=linker.href(file), alt="QC measures of every run by site",
                      caption="Each dot is a run, grouped by site; the line is the site median; runs flagged by the "
                              "outlier rule are in red and named.", source=data))
    order = sorted(range(len(run_qcs)), key=lambda i: (sites[i], labels[i]))
    q = [list(run_qcs[i].ar_quantiles) for i in order]
    ar_flags = ["ar_median" in run_qcs[i].flags for i in order]
    content = {"labels": [labels[i] for i in order], "sites": [sites[i] for i in order],
               "q": [_rounded(x) for x in q], "flags": ar_flags}
    file = caches.figures.figure(
        f"ar-{cache_key('ar-distribution', content)}.png",
        lambda p: figures.plot_ar_distribution(p, [labels[i] for i in order], [sites[i] for i in order], q, ar_flags))
    out.append(Figure(src=linker.href(file), alt="lag-1 AR coefficient distribution of every run",
                      caption="Lag-1 AR coefficient over each run's fitted voxels: thin line 5-95 %, bar 25-75 %, "
                              "tick median; runs grouped by site.", source=data))
    if contrasts:
        vals = [[r.efficiency.get(c, math.nan) for r in run_qcs] for c in contrasts]
        flg = [[f"efficiency:{c}" in r.flags for r in run_qcs] for c in contrasts]
        content = {"contrasts": list(contrasts), "sites": sites, "labels": labels, "v": [_rounded(v) for v in vals],
                   "f": flg}
        file = caches.figures.figure(
            f"efficiency-{cache_key('efficiency', content)}.png",
            lambda p: figures.plot_efficiency(p, list(contrasts), sites, labels, vals, flg))
        out.append(Figure(src=linker.href(file), alt="design efficiency of each contrast in each run",
                          caption="Design efficiency of each contrast in each kept run (log scale; markers by site). "
                                  "Efficiency is 1 / trace(C (X'X)+ C') of the fitted design, as in the contrast "
                                  "sidecars; higher is better.", source=data))
    return out


@dataclass
class ThresholdOutputs:
    """Threshold outputs by the lineage of the z map they threshold."""

    thresholded: dict[str, list[str]] = field(default_factory=lambda: defaultdict(list))
    clusters: dict[str, str] = field(default_factory=dict)   # thresholded lineage -> clusters.tsv


def _threshold_outputs(records: Records, sources: ReportSources) -> ThresholdOutputs:
    out = ThresholdOutputs()
    for path in sources.thresholded:
        out.thresholded[input_lineage(records.of(path), "z")].append(path)
    for path in sources.clusters:
        out.clusters[lineage_of(records.of(path))] = path
    return out


def _threshold_parts(records: Records, linker: Linker, caches: Caches, settings: ReportSettings,
                     outputs: ThresholdOutputs, path: str, title: str, draw: bool = True
                     ) -> tuple[Figure | None, list[Table], list[FileLink], str]:
    """Mosaic (if ``draw``), cluster table and links of one thresholded map."""
    side = records.sidecar(path)
    record = records.of(path) or {}
    params = record.get("params") or {}
    name = str(side.get("threshold") or params.get("name") or "threshold")
    method = str((side.get("setting") or {}).get("method") or params.get("method") or "")
    note = str(side.get("note") or "")
    underlay = input_path(record, "underlay")
    figure = None
    if draw and underlay and records.resolve(underlay).is_file():
        figure = mosaic_figure(caches, linker, path, os.fspath(records.resolve(underlay)), settings,
                               caption=f"{title}: threshold {name} ({method}); {note}")
    tabs: list[Table] = []
    own = linker.link(path, f"thresholded ({name})")
    links = [own if not draw else FileLink(own.label, own.href, own.lineage_hash)]
    clusters = outputs.clusters.get(lineage_of(record), "")
    if clusters:
        from ..fileio import read_tsv

        # the table's map is the thresholded map (same job): its audit chain is the map's
        link = FileLink(f"clusters ({name})", linker.href(clusters), lineage_of(records.of(clusters)),
                        own.audit_href, own.audit_text)
        tabs.append(tables.cluster_table(read_tsv(clusters), f"Clusters surviving threshold {name} ({method})", link))
        links.append(FileLink(link.label, link.href, link.lineage_hash))
    return figure, tabs, links, note


def _map_links(linker: Linker, rows: Sequence[IndexRow]) -> list[FileLink]:
    order = {s: i for i, s in enumerate(("effect", "variance", "t", "f", "z", "p", "p_fwe", "p_fwe_cluster",
                                         "p_fwe_tfce"))}
    out = []
    for row in sorted(rows, key=lambda r: (order.get(r.stat, 99), r.stat)):
        label = Path(row.path).name + ("" if row.status == "ok" else f" ({row.status})")
        out.append(FileLink(label=label, href=linker.href(row.path), lineage_hash=row.lineage_hash))
    return out


def _run_section(records: Records, linker: Linker, caches: Caches, r: RunFiles, rq: RunQc,
                 rows: Sequence[IndexRow], warn: _Warnings) -> RunSection:
    design_tsv = input_path(r.fit_record, "design")
    design_tsv = os.fspath(records.resolve(design_tsv)) if design_tsv else r.design
    design_record = records.of(r.design) if r.design else None
    conf_tsv = input_path(design_record, "confounds")
    conf_tsv = os.fspath(records.resolve(conf_tsv)) if conf_tsv else r.confounds
    title = f"sub-{r.subject} {r.run_id}"
    figs = [copied_figure(caches, linker, r.design_figure, design_tsv, f"{title}: design matrix (columns by role)"),
            copied_figure(caches, linker, r.correlation_figure, design_tsv, f"{title}: regressor correlations"),
            copied_figure(caches, linker, r.confounds_figure, conf_tsv,
                          f"{title}: confound traces; censored volumes shaded")]
    links = [linker.link(r.fit, "fit.h5")]
    links += [linker.link(p, with_audit=False) for p in (r.mean, r.ar_coef) if p]
    run_rows = [row for row in rows if row.level == "run" and row.subject == r.subject and row.task == r.task
                and row.run == r.run and (row.session or "") == (r.session or "")]
    for contrast in sorted({row.contrast for row in run_rows}):
        picked = [row for row in run_rows if row.contrast == contrast and row.stat == "z"]
        for row in picked:
            links.append(FileLink(label=f"z, contrast {contrast}" + ("" if row.status == "ok" else f" ({row.status})"),
                                  href=linker.href(row.path), lineage_hash=row.lineage_hash))
    messages: list[str] = []
    for path, where in ((r.events, "events"), (r.confounds, "confounds"), (r.design, "design"), (r.fit, "fit")):
        if path:
            messages += warn.take(records.of(path), f"{title} {where}")
    for row in run_rows:
        if row.stat == "z":
            messages += warn.take(records.of(row.path), f"{title} contrast {row.contrast}")
    return RunSection(qc=rq, figures=tuple(f for f in figs if f is not None), links=tuple(links),
                      warnings=tuple(messages))


def _subject_maps(records: Records, linker: Linker, caches: Caches, settings: ReportSettings, subject: str,
                  rows: Sequence[IndexRow], outputs: ThresholdOutputs, warn: _Warnings,
                  runs: Sequence[RunFiles]) -> list[MapSection]:
    mine = [row for row in rows if row.level == "subject" and row.subject == subject]
    first_mean = next((r.mean for r in runs if r.subject == subject and r.mean), "")
    sections = []
    for contrast in sorted({row.contrast for row in mine}):
        crow = [row for row in mine if row.contrast == contrast]
        z = next((row for row in crow if row.stat == "z"), None)
        title = f"sub-{subject}, contrast {contrast}"
        figure, tabs, notes, summary = None, [], [], ""
        links = _map_links(linker, crow)
        messages: list[str] = []
        if z is not None:
            side = records.sidecar(z.path)
            used = side.get("runs_used") or []
            left = side.get("runs_left_out") or []
            if used:
                notes.append(f"runs combined (fixed effects): {', '.join(map(str, used))}")
            for item in left:
                if isinstance(item, Mapping):
                    notes.append(f"run left out: {item.get('run', '')}: {item.get('reason', '')}")
            messages += warn.take(records.of(z.path), title)
            done = outputs.thresholded.get(z.lineage_hash, [])
            for n, path in enumerate(sorted(done)):
                fig, t, lk, note = _threshold_parts(records, linker, caches, settings, outputs, path, title,
                                                    draw=n == 0)
                figure = figure or fig
                tabs += t
                links += lk
                summary = summary or note
                messages += warn.take(records.of(path), f"{title} threshold")
            if figure is None and first_mean and z.status == "ok":
                figure = mosaic_figure(caches, linker, z.path, first_mean, settings, vmin=DISPLAY_Z,
                                       caption=f"{title}: z where |z| >= {DISPLAY_Z} (display only, not a test; "
                                               "no subject-level threshold setting)")
            if z.status != "ok":
                notes.append(f"map {z.status}: {side.get('reason', '')}")
        sections.append(MapSection(anchor=f"map-{contrast}", title=title, summary=summary, figure=figure,
                                   tables=tuple(tabs), links=tuple(links), notes=tuple(notes),
                                   warnings=tuple(messages)))
    return sections


def _group_key(records: Records, row: IndexRow) -> tuple[str, str, str]:
    block = records.sidecar(row.path).get("group") or {}
    first, _, gcon = row.contrast.partition(".")
    model = str(block.get("model") or (m.group(1) if (m := re.search(r"model-([A-Za-z0-9_]+)", row.path)) else ""))
    return (model, str(block.get("first_level_contrast") or first), str(block.get("group_contrast") or gcon))


def _group_models(records: Records, linker: Linker, caches: Caches, settings: ReportSettings,
                  rows: Sequence[IndexRow], outputs: ThresholdOutputs, sources: ReportSources,
                  warn: _Warnings) -> tuple[list[ModelSection], list[str]]:
    groups: dict[tuple[str, str, str], list[IndexRow]] = defaultdict(list)
    for row in rows:
        if row.level == "group":
            groups[_group_key(records, row)].append(row)
    site_qc = _by_lineage(records, sources.site_qc)
    site_figs = _by_lineage(records, sources.site_figures)
    perm = _by_lineage(records, sources.permutation_clusters)
    excluded: list[str] = []
    by_model: dict[str, list[MapSection]] = defaultdict(list)
    descriptions: dict[str, str] = {}
    for (model, first, gcon) in sorted(groups):
        grows = groups[(model, first, gcon)]
        z = next((row for row in grows if row.stat == "z"), None)
        title = f"model {model}: contrast {first}, group contrast {gcon}"
        figure, tabs, extra, notes, summary = None, [], [], [], ""
        links = _map_links(linker, grows)
        messages: list[str] = []
        if z is not None:
            side = records.sidecar(z.path)
            record = records.of(z.path) or {}
            block = side.get("group") or {}
            params = record.get("params") or {}
            descriptions.setdefault(model, ", ".join(
                f"{k.replace('_', ' ')}: {audit.format_value(params[k])}"
                for k in ("design", "estimation", "site_as_covariate", "harmonise_sites", "covariates", "mask_fraction")
                if k in params))
            messages += warn.take(record, title)
            n_sub = block.get("n_subjects")
            if n_sub is not None:
                notes.append(f"{n_sub} subjects; degrees of freedom {tables.format_number(block.get('dof_min'))}"
                             + (f"-{tables.format_number(block.get('dof_max'))}"
                                if block.get("dof_max") != block.get("dof_min") else ""))
            for item in block.get("excluded_subjects") or []:
                if isinstance(item, Mapping):
                    text = f"sub-{item.get('subject', '')}: {item.get('reason', '')}"
                    notes.append(f"subject excluded: {text}")
                    if text not in excluded:
                        excluded.append(f"{text} (model {model}, contrast {first})")
            if block.get("site_harmonisation"):
                notes.append(f"site harmonisation: {block['site_harmonisation']}")
            done = outputs.thresholded.get(z.lineage_hash, [])
            for n, path in enumerate(sorted(done)):
                fig, t, lk, note = _threshold_parts(records, linker, caches, settings, outputs, path, title,
                                                    draw=n == 0)
                figure = figure or fig
                tabs += t
                links += lk
                summary = summary or note
                messages += warn.take(records.of(path), f"{title} threshold")
            for qc_path in site_qc.get(z.lineage_hash, []):
                data = records.sidecar(qc_path)
                link = linker.link(qc_path, "site_qc.json", with_audit=False)
                table = tables.site_table(data.get("sites") or {}, link) if isinstance(data.get("sites"), Mapping) \
                    else None
                if table is not None:
                    tabs.append(table)
                else:
                    notes.append("per-site numbers: site_qc.json has no 'sites' block; the figure shows them")
                links.append(link)
            for fig_path in site_figs.get(z.lineage_hash, []):
                fig = copied_figure(caches, linker, fig_path, z.path,
                                    f"{title}: subjects' mean effect in the group mask, by site"
                                    + (" (as entered and after harmonisation)" if block.get("site_harmonisation")
                                       else ""))
                if fig is not None:
                    extra.append(fig)
        for prow in [row for row in grows if row.stat == "p_fwe"]:
            for pc in perm.get(prow.lineage_hash, []):
                from ..fileio import read_tsv

                pside = records.sidecar(pc)
                perm_block = pside.get("permutation") or {}
                link = linker.link(pc, "permutation_clusters.tsv")
                caption = "Permutation clusters"
                if perm_block:
                    caption += (f" ({perm_block.get('n_permutations', '?')} permutations, cluster-forming "
                                f"p {perm_block.get('cluster_forming_p', '?')}; FWE p from the permutation maximum)")
                tabs.append(tables.cluster_table(read_tsv(pc), caption, link))
                links.append(FileLink(link.label, link.href, link.lineage_hash))
                messages += warn.take(records.of(pc), f"{title} permutation")
        by_model[model].append(MapSection(anchor=f"group-{model}-{first}-{gcon}", title=title, summary=summary,
                                          figure=figure, tables=tuple(tabs), extra_figures=tuple(extra),
                                          links=tuple(links), notes=tuple(notes), warnings=tuple(messages)))
    models = [ModelSection(anchor=f"model-{m}", name=m, description=descriptions.get(m, ""),
                           sections=tuple(by_model[m])) for m in sorted(by_model)]
    return models, excluded


def _contrast_infos(rows: Sequence[IndexRow], definitions: Mapping[str, Mapping[str, Any]],
                    run_qcs: Sequence[RunQc], models: Sequence[ModelSection]) -> list[ContrastInfo]:
    names = sorted(set(definitions) | {row.contrast for row in rows if row.level in ("run", "subject") and row.contrast})
    out = []
    for name in names:
        definition = definitions.get(name, {})
        kind = "F" if "rows" in definition else "t"
        effs = [r.efficiency.get(name, math.nan) for r in run_qcs if not r.excluded]
        effs = [e for e in effs if math.isfinite(e)]
        eff = (f"median {tables.format_number(float(np.median(effs)))} (range {tables.format_number(min(effs))}"
               f"-{tables.format_number(max(effs))}) over {len(effs)} runs") if effs else "not available"
        anchors = tuple((sec.anchor, sec.title) for m in models for sec in m.sections
                        if sec.anchor.startswith(f"group-{m.name}-{name}-"))
        counts: dict[str, dict[str, int]] = defaultdict(lambda: defaultdict(int))
        for row in rows:
            if row.contrast == name and row.stat == "z":
                counts[row.level][row.status] += 1
        status = "; ".join(f"{level} maps: " + ", ".join(f"{n} {s}" for s, n in sorted(c.items()))
                           for level, c in sorted(counts.items()))
        out.append(ContrastInfo(anchor=f"contrast-{name}", name=name, kind=kind,
                                definition=tables.weights_text(definition) if definition else "(definition not recorded)",
                                efficiency=eff, group_anchors=anchors, status=status or "no maps"))
    return out


_STEP_ORDER = ("validate_events", "select_confounds", "build_design", "fit", "contrast", "combine_runs", "threshold",
               "group_model", "group_permutation")


def _settings_rows(records: Records, runs: Sequence[RunFiles], rows: Sequence[IndexRow],
                   outputs: ThresholdOutputs) -> list[SettingsRow]:
    found: dict[tuple[str, str], dict[str, Any]] = {}
    used: dict[tuple[str, str], set[str]] = defaultdict(set)

    def add(record: Mapping[str, Any] | None, label: str) -> None:
        if not record or "params_hash" not in record:
            return
        key = (str(record.get("step", "?")), str(record["params_hash"]))
        found.setdefault(key, dict(record.get("params") or {}))
        used[key].add(label)

    run_counts: dict[tuple[str, str], int] = defaultdict(int)
    for r in runs:
        for path in (r.events, r.confounds, r.design):
            rec = records.of(path) if path else None
            if rec:
                run_counts[(str(rec.get("step")), str(rec.get("params_hash")))] += 1
                add(rec, "")
        run_counts[(str(r.fit_record.get("step")), str(r.fit_record.get("params_hash")))] += 1
        add(r.fit_record, "")
    seen_lineage: set[str] = set()
    for row in rows:
        if row.lineage_hash in seen_lineage:
            continue
        seen_lineage.add(row.lineage_hash)
        rec = records.of(row.path)
        if row.level == "group":
            block = records.sidecar(row.path).get("group") or {}
            add(rec, f"model {block.get('model', '?')}, group contrast {block.get('group_contrast', '?')}")
        else:
            add(rec, f"contrast {row.contrast}")
    for paths in outputs.thresholded.values():
        for path in paths:
            rec = records.of(path)
            block = records.sidecar(path).get("map") or {}
            add(rec, f"threshold {(rec or {}).get('params', {}).get('name', '?')} ({block.get('level', '?')} level)")
    out = []
    for key in sorted(found, key=lambda k: (_STEP_ORDER.index(k[0]) if k[0] in _STEP_ORDER else 99, k)):
        labels = sorted(x for x in used[key] if x)
        if key in run_counts:
            labels = [f"{run_counts[key]} run(s)"] + labels
        out.append(SettingsRow(step=key[0], used_by="; ".join(labels), params_hash=key[1],
                               settings=tuple(audit.describe_params(found[key]))))
    return out


def report_facts(report: Report, caches: Caches) -> dict[str, Any]:
    """What the report job records in its sidecar: counts, and what the caches did this run."""
    return {
        "n_subjects": len(report.subjects), "n_runs": len(report.runs),
        "n_runs_excluded": sum(r.excluded for r in report.runs),
        "excluded_runs": [f"sub-{r.subject} {r.run_id}: {r.reason}" for r in report.runs if r.excluded],
        "n_group_sections": sum(len(m.sections) for m in report.models),
        "figures_drawn": sorted(caches.figures.drawn), "figures_copied": sorted(caches.figures.copied),
        "figures_reused": len(caches.figures.reused), "audit_texts_written": len(caches.audit.written),
        "audit_texts_reused": len(caches.audit.reused), "qc_entries_computed": len(caches.numbers.written),
        "warnings_by_step": dict(report.warnings_by_step),
    }
