"""HTML rendering of the report pages (pure: a :class:`Report` in, text out).

The pages are self-contained: one inline style sheet, a few lines of plain
JavaScript (mark an image that failed to load, sort a table by a column,
show only flagged runs), images as PNG files beside the pages, no network.
Colour scales of the mosaics are CSS gradients of the mosaic's own colour maps.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from html import escape

from ..plots.mosaic import NEGATIVE_CMAP, POSITIVE_CMAP, gradient_stops
from .model import ContrastInfo, Figure, FileLink, MapSection, ModelSection, Report, RunQc, RunSection, SubjectPage, Table
from .tables import format_number

#: Hex digits of a hash shown on the page (the full hash is in the tooltip).
SHORT = 12
#: Lines of an audit chain embedded in a page; a longer chain (a group map's names every subject's
#: inputs) shows its first lines and links to the whole text file beside the pages.
MAX_AUDIT_LINES = 80

STYLE = """
:root { --ink:#2b3440; --paper:#f6f4ee; --ember:#b23a1e; --sand:#f2b880; --teal:#1d5c63; --mist:#9cc5c0;
        --line:#d9d4c8; --soft:#ece8df; --flag:#f7d6c8; }
* { box-sizing: border-box; }
body { margin:0; font:14px/1.45 system-ui, -apple-system, "Segoe UI", sans-serif; color:var(--ink);
       background:var(--paper); }
header.top { background:var(--ink); color:var(--paper); padding:14px 28px; display:flex; gap:24px;
             align-items:baseline; flex-wrap:wrap; }
header.top h1 { margin:0; font-size:20px; letter-spacing:.02em; }
header.top a { color:var(--sand); }
header.top .meta { font-size:12px; opacity:.85; }
.layout { display:flex; align-items:flex-start; }
nav.side { position:sticky; top:0; width:210px; flex:none; max-height:100vh; overflow:auto; padding:16px 10px 16px 20px;
           font-size:13px; border-right:1px solid var(--line); }
nav.side a { display:block; color:var(--ink); text-decoration:none; padding:2px 6px; border-radius:3px; }
nav.side a:hover { background:var(--soft); }
nav.side .sub { padding-left:16px; font-size:12px; }
main { flex:1; min-width:0; padding:10px 28px 60px; max-width:1180px; }
h2 { margin:28px 0 8px; font-size:18px; border-bottom:2px solid var(--ember); padding-bottom:3px; }
h3 { margin:22px 0 6px; font-size:15px; }
h4 { margin:14px 0 4px; font-size:13px; }
section.card { background:#fff; border:1px solid var(--line); border-left:4px solid var(--teal); border-radius:4px;
               padding:10px 16px 14px; margin:14px 0; }
.glance { display:flex; flex-wrap:wrap; gap:12px; }
.glance .num { background:#fff; border:1px solid var(--line); border-radius:4px; padding:8px 14px; min-width:120px; }
.glance .num b { display:block; font-size:22px; color:var(--teal); }
.rule { background:var(--soft); border-left:4px solid var(--ember); padding:6px 12px; margin:8px 0; font-size:13px; }
table { border-collapse:collapse; margin:6px 0 4px; font-size:12.5px; background:#fff; }
th, td { border:1px solid var(--line); padding:3px 7px; text-align:left; vertical-align:top; }
th { background:var(--soft); cursor:pointer; white-space:nowrap; }
td.num { text-align:right; font-variant-numeric:tabular-nums; }
td.flag { background:var(--flag); font-weight:600; }
td.flag::after { content:" \\25B2"; color:var(--ember); font-size:9px; }
tr.excluded td { color:#8a8578; font-style:italic; }
caption { caption-side:top; text-align:left; font-size:12px; padding:2px 0; color:#5a6270; }
figure { margin:10px 0; }
figure img { max-width:100%; height:auto; border:1px solid var(--line); background:#fff; display:block; }
figure.mosaic img { background:#10151b; }
figcaption { font-size:12px; color:#4b5360; margin-top:3px; }
.lr { display:flex; justify-content:space-between; font-size:11px; font-weight:700; color:var(--teal); max-width:100%; }
.scale { display:flex; align-items:center; gap:6px; font-size:11px; margin:4px 0; flex-wrap:wrap; }
.scale .bar { width:140px; height:10px; border:1px solid var(--line); }
.lineage { font:11px ui-monospace, Menlo, Consolas, monospace; color:#5a6270; }
.links { font-size:12.5px; margin:6px 0; }
.links a { margin-right:10px; white-space:nowrap; }
details { margin:4px 0; font-size:12px; }
details summary { cursor:pointer; color:var(--teal); }
details pre { max-height:420px; overflow:auto; background:var(--paper); border:1px solid var(--line); padding:8px;
              font:11px/1.35 ui-monospace, Menlo, Consolas, monospace; white-space:pre; }
.warn { background:#fff4e0; border-left:4px solid var(--sand); padding:4px 10px; margin:4px 0; font-size:12.5px; }
.note { font-size:12.5px; color:#4b5360; margin:3px 0; }
.missing { outline:3px solid var(--ember); }
.figrow { display:flex; flex-wrap:wrap; gap:14px; align-items:flex-start; }
.figrow figure { flex:1 1 300px; max-width:560px; }
.figrow figure.wide { flex-basis:100%; max-width:980px; }
.figrow figure.small { max-width:420px; }
.scroll { overflow-x:auto; max-width:100%; }
.mosaicbox { display:inline-block; max-width:100%; }
td.id { white-space:nowrap; }
ul.tight { margin:4px 0; padding-left:20px; }
"""

SCRIPT = """
(function () {
  function broken(img) {
    img.classList.add('missing');
    var note = document.createElement('div');
    note.className = 'warn';
    note.textContent = 'figure missing: ' + img.getAttribute('src');
    img.insertAdjacentElement('afterend', note);
  }
  document.querySelectorAll('img').forEach(function (img) {
    if (img.complete && img.naturalWidth === 0) { broken(img); }
    else { img.addEventListener('error', function () { broken(img); }); }
  });
  document.querySelectorAll('table.sortable th').forEach(function (th, col) {
    th.addEventListener('click', function () {
      var body = th.closest('table').tBodies[0];
      var rows = Array.prototype.slice.call(body.rows);
      var up = th.dataset.order !== 'up';
      th.dataset.order = up ? 'up' : 'down';
      rows.sort(function (a, b) {
        var x = a.cells[th.cellIndex].dataset.v || a.cells[th.cellIndex].textContent;
        var y = b.cells[th.cellIndex].dataset.v || b.cells[th.cellIndex].textContent;
        var nx = parseFloat(x), ny = parseFloat(y);
        var c = (!isNaN(nx) && !isNaN(ny)) ? nx - ny : x.localeCompare(y);
        return up ? c : -c;
      });
      rows.forEach(function (r) { body.appendChild(r); });
    });
  });
  var only = document.getElementById('only-flagged');
  if (only) {
    only.addEventListener('change', function () {
      document.querySelectorAll('#run-table tbody tr').forEach(function (tr) {
        tr.style.display = (only.checked && !tr.classList.contains('flagged')) ? 'none' : '';
      });
    });
  }
  document.body.dataset.ready = 'yes';
})();
"""


def _e(text: object) -> str:
    return escape(str(text), quote=True)


class _Audits:
    """Embeds each audit chain once per page; later references point to the first."""

    def __init__(self) -> None:
        self.shown: dict[str, str] = {}

    def block(self, link: FileLink) -> str:
        if not link.audit_text:
            return ""
        key = link.audit_href or link.href
        if key in self.shown:
            return (f'<details><summary>audit chain</summary><p class="note">the same chain as '
                    f'<a href="#{self.shown[key]}">above</a>'
                    + (f'; <a href="{_e(link.audit_href)}">as a text file</a>' if link.audit_href else "")
                    + "</p></details>")
        anchor = f"audit-{len(self.shown) + 1}"
        self.shown[key] = anchor
        lines = link.audit_text.splitlines()
        text = "\n".join(lines[:MAX_AUDIT_LINES])
        more = len(lines) - MAX_AUDIT_LINES
        file_link = ""
        if link.audit_href:
            what = f"the whole chain ({len(lines)} lines)" if more > 0 else "as a text file"
            file_link = f'<p class="note"><a href="{_e(link.audit_href)}">{what}</a></p>'
        tail = f"\n... {more} more lines in the whole chain (link above)" if more > 0 else ""
        return (f'<details id="{anchor}"><summary>audit chain (plain words, as <code>glmsteps audit</code> '
                f"prints it)</summary>{file_link}<pre>{_e(text + tail)}</pre></details>")


def lineage_span(lineage_hash: str) -> str:
    """The short lineage hash with the full one as a tooltip."""
    if not lineage_hash:
        return ""
    return f'<span class="lineage" title="lineage {_e(lineage_hash)}">lineage {_e(lineage_hash[:SHORT])}</span>'


def source_line(link: FileLink | None, audits: _Audits) -> str:
    """Link to the file a figure or table shows, its lineage hash and its audit chain."""
    if link is None:
        return ""
    return (f'<div class="links">file: <a class="map-link" href="{_e(link.href)}">{_e(link.label)}</a> '
            f"{lineage_span(link.lineage_hash)}</div>{audits.block(link)}")


def render_links(links: Iterable[FileLink], audits: _Audits) -> str:
    items = []
    blocks = []
    for link in links:
        items.append(f'<a class="map-link" href="{_e(link.href)}" title="lineage {_e(link.lineage_hash)}">'
                     f"{_e(link.label)}</a>")
        blocks.append(audits.block(link))
    if not items:
        return ""
    return '<div class="links">maps and files: ' + " ".join(items) + "</div>" + "".join(b for b in blocks if b)


def _scale(scale: tuple[float, float, bool] | None) -> str:
    if scale is None:
        return '<div class="scale">no voxel shown in colour</div>'
    vmin, vmax, signed = scale
    pos = ", ".join(gradient_stops(POSITIVE_CMAP))
    neg = ", ".join(gradient_stops(NEGATIVE_CMAP)[::-1])
    parts = []
    if signed:
        parts.append(f'<span>-{format_number(vmax)}</span><span class="bar" style="background:linear-gradient(to right, '
                     f'{neg})"></span><span>-{format_number(vmin)}</span>')
    parts.append(f'<span>{format_number(vmin)}</span><span class="bar" style="background:linear-gradient(to right, '
                 f'{pos})"></span><span>{format_number(vmax)}</span>')
    return '<div class="scale">' + "&nbsp;&nbsp;".join(parts) + "</div>"


def render_figure(fig: Figure, audits: _Audits, mosaic: bool = False, size: str = "") -> str:
    """An image with its caption, its map link, lineage and audit chain.

    ``size`` is ``"wide"`` or ``"small"`` for figures in a row.
    """
    classes = [c for c in ("mosaic" if mosaic else "", size) if c]
    cls = f' class="{" ".join(classes)}"' if classes else ""
    image = f'<img src="{_e(fig.src)}" alt="{_e(fig.alt)}">'
    tail = ""
    if mosaic:
        image = f'<div class="mosaicbox"><div class="lr"><span>L</span><span>R</span></div>{image}</div>'
        slices = ", ".join(f"{z:.0f}" for z in fig.slice_mm)
        tail = (_scale(fig.scale) + f'<div class="note">axial slices at z = {_e(slices)} mm (world, RAS), '
                "inferior to superior, row by row; in every slice the subject's left is on the left (L) and "
                "anterior is at the top</div>")
    return (f"<figure{cls}>{image}<figcaption>{_e(fig.caption)}</figcaption>{tail}"
            f"{source_line(fig.source, audits)}</figure>")


def render_table(table: Table, audits: _Audits, sortable: bool = False, table_id: str = "") -> str:
    attrs = ' class="sortable"' if sortable else ""
    if table_id:
        attrs += f' id="{_e(table_id)}"'
    head = "".join(f"<th>{_e(c)}</th>" for c in table.columns)
    body = []
    for i, row in enumerate(table.rows):
        cells = []
        for j, cell in enumerate(row):
            classes = []
            if _looks_numeric(cell):
                classes.append("num")
            if (i, j) in table.flags:
                classes.append("flag")
            cls = f' class="{" ".join(classes)}"' if classes else ""
            cells.append(f"<td{cls}>{_e(cell)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    caption = f"<caption>{_e(table.caption)}</caption>" if table.caption else ""
    return (f'<div class="scroll"><table{attrs}>{caption}<thead><tr>{head}</tr></thead><tbody>{"".join(body)}'
            f"</tbody></table></div>" + source_line(table.source, audits))


def _looks_numeric(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return cell == "n/a"
    return True


def _fmt(value: float, digits: int = 3) -> str:
    return format_number(value, digits) if math.isfinite(value) else "n/a"


def page(title: str, nav: str, body: str, header_extra: str = "") -> str:
    """A whole HTML document."""
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
            f"<title>{_e(title)}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n"
            f'<header class="top"><h1>{_e(title)}</h1>{header_extra}</header>\n'
            f'<div class="layout"><nav class="side">{nav}</nav>\n<main>\n{body}\n</main></div>\n'
            f"<script>{SCRIPT}</script>\n</body>\n</html>\n")


# ----------------------------------------------------------------------------
# the study page
# ----------------------------------------------------------------------------

def _run_cells(r: RunQc, keys: Sequence[str]) -> list[tuple[str, bool]]:
    cells = []
    for key in keys:
        v = r.values.get(key, math.nan)
        cells.append((_fmt(v, 3), key in r.flags))
    return cells


def render_run_table(report: Report, subject_links: bool = True, runs: Sequence[RunQc] | None = None) -> str:
    runs = report.runs if runs is None else runs
    keys = [k for k, _ in report.qc_measures]
    head = ["subject", "site", "run", "status"] + [label for _, label in report.qc_measures] + ["flags"]
    pages = {p.subject: p.filename for p in report.subject_pages}
    rows = []
    for r in runs:
        flagged = sorted(r.flags)
        classes = [c for c, on in (("excluded", r.excluded), ("flagged", bool(flagged))) if on]
        cls = f' class="{" ".join(classes)}"' if classes else ""
        subject = (f'<a href="{_e(pages[r.subject])}#run-{_e(r.run_id)}">sub-{_e(r.subject)}</a>'
                   if subject_links and r.subject in pages else f"sub-{_e(r.subject)}")
        status = f"excluded: {_e(r.reason)}" if r.excluded else "kept"
        cells = [f'<td class="id">{subject}</td>', f"<td>{_e(r.site)}</td>", f'<td class="id">{_e(r.run_id)}</td>',
                 f"<td>{status}</td>"]
        for text, flag in _run_cells(r, keys):
            cells.append(f'<td class="num{" flag" if flag else ""}" data-v="{_e(text)}">{_e(text)}</td>')
        cells.append(f"<td>{_e(', '.join(f.replace('efficiency:', 'efficiency ') for f in flagged))}</td>")
        rows.append(f"<tr{cls}>" + "".join(cells) + "</tr>")
    head_html = "".join(f"<th>{_e(h)}</th>" for h in head)
    return (f'<div class="scroll"><table class="sortable" id="run-table"><caption>One row per run; click a column '
            "to sort. Motion: the run's motion summary (see the subject page for its source).</caption><thead><tr>"
            f"{head_html}</tr></thead><tbody>{''.join(rows)}</tbody></table></div>")


def _settings_table(report: Report) -> str:
    rows = []
    for s in report.settings:
        if s.settings:
            items = "".join(f"<li>{_e(x)}</li>" for x in s.settings)
            first = s.settings[0] if len(s.settings[0]) <= 60 else s.settings[0][:57] + "..."
            settings = (f"<details><summary>{len(s.settings)} setting(s): {_e(first)}</summary>"
                        f'<ul class="tight">{items}</ul></details>')
        else:
            settings = "none"
        rows.append(f'<tr><td>{_e(s.step)}</td><td>{_e(s.used_by)}</td><td class="lineage" title="{_e(s.params_hash)}">'
                    f"{_e(s.params_hash[:SHORT])}</td><td>{settings}</td></tr>")
    return ('<div class="scroll"><table><caption>Every step\'s settings, one row per distinct params hash (the sha256 '
            "of the settings' canonical JSON).</caption><thead><tr><th>step</th><th>used by</th><th>params hash</th>"
            f"<th>settings</th></tr></thead><tbody>{''.join(rows)}</tbody></table></div>")


def _contrast_block(c: ContrastInfo) -> str:
    groups = ", ".join(f'<a href="#{_e(a)}">{_e(t)}</a>' for a, t in c.group_anchors) or "none"
    return (f'<section class="card" id="{_e(c.anchor)}"><h3>contrast {_e(c.name)} ({_e(c.kind)})</h3>'
            f'<div class="note">definition: {_e(c.definition)}</div>'
            f'<div class="note">design efficiency: {_e(c.efficiency)}</div>'
            f'<div class="note">maps: {_e(c.status)}</div><div class="note">group results: {groups}</div></section>')


def render_map_section(sec: MapSection, audits: _Audits, level: str = "h3") -> str:
    parts = [f'<section class="card" id="{_e(sec.anchor)}"><{level}>{_e(sec.title)}</{level}>']
    if sec.summary:
        parts.append(f'<div class="note">{_e(sec.summary)}</div>')
    for n in sec.notes:
        parts.append(f'<div class="note">{_e(n)}</div>')
    if sec.figure is not None:
        parts.append(render_figure(sec.figure, audits, mosaic=True))
    for t in sec.tables:
        parts.append(render_table(t, audits))
    if sec.extra_figures:
        parts.append('<div class="figrow">' + "".join(render_figure(f, audits, size="small") for f in sec.extra_figures)
                     + "</div>")
    parts.append(render_links(sec.links, audits))
    for w in sec.warnings:
        parts.append(f'<div class="warn">warning: {_e(w)}</div>')
    parts.append("</section>")
    return "".join(parts)


def _model_block(m: ModelSection, audits: _Audits) -> str:
    body = "".join(render_map_section(s, audits, "h4") for s in m.sections)
    return (f'<section id="{_e(m.anchor)}"><h3>group model {_e(m.name)}</h3>'
            f'<div class="note">{_e(m.description)}</div>{body}</section>')


def render_study_page(report: Report) -> str:
    """The study page (``index.html``)."""
    audits = _Audits()
    n_excl = sum(r.excluded for r in report.runs)
    nav = ['<a href="#glance">At a glance</a>', '<a href="#settings">Settings</a>', '<a href="#qc">Quality control</a>',
           '<a href="#contrasts">Contrasts</a>']
    nav += [f'<a class="sub" href="#{_e(c.anchor)}">{_e(c.name)}</a>' for c in report.contrasts]
    nav.append('<a href="#group">Group results</a>')
    for m in report.models:
        nav.append(f'<a class="sub" href="#{_e(m.anchor)}">{_e(m.name)}</a>')
    nav.append('<a href="#subjects">Subjects</a>')
    nav += [f'<a class="sub" href="{_e(p.filename)}">sub-{_e(p.subject)}</a>' for p in report.subject_pages]

    glance = ['<div class="glance">',
              f'<div class="num"><b>{len(report.subjects)}</b>subjects</div>',
              f'<div class="num"><b>{len(report.sites)}</b>sites</div>',
              f'<div class="num"><b>{len(report.runs) - n_excl}</b>runs kept</div>',
              f'<div class="num"><b>{n_excl}</b>runs excluded</div>',
              f'<div class="num"><b>{len(report.contrasts)}</b>contrasts</div>',
              f'<div class="num"><b>{len(report.models)}</b>group models</div></div>']
    glance.append('<p class="note">sites: ' + _e(", ".join(f"{s} ({n} subjects)" for s, n in report.sites.items()))
                  + "</p>")
    excluded = [r for r in report.runs if r.excluded]
    if excluded:
        glance.append("<h4>Runs excluded</h4><ul class=\"tight\">" + "".join(
            f"<li>sub-{_e(r.subject)} {_e(r.run_id)}: {_e(r.reason)}</li>" for r in excluded) + "</ul>")
    else:
        glance.append('<p class="note">No run was excluded.</p>')
    if report.skipped:
        glance.append("<h4>Maps skipped (contrast not estimable)</h4><ul class=\"tight\">"
                      + "".join(f"<li>{_e(s)}</li>" for s in report.skipped) + "</ul>")
    if report.excluded_subjects:
        glance.append("<h4>Subjects excluded from group models</h4><ul class=\"tight\">"
                      + "".join(f"<li>{_e(s)}</li>" for s in report.excluded_subjects) + "</ul>")
    counts = ", ".join(f"{step}: {n}" for step, n in report.warnings_by_step.items() if n) or "none"
    glance.append(f'<p class="note">warnings recorded, by step: {_e(counts)} (listed on the subject pages and in '
                  "the group sections)</p>")
    for n in report.notes:
        glance.append(f'<p class="note">{_e(n)}</p>')
    glance.append(f'<p class="note">every map: <a class="map-link" href="{_e(report.index.href)}">index.tsv</a> '
                  "(level, subject, contrast, stat, path, status, params and lineage hashes)</p>")

    qc_parts = [f'<div class="rule"><b>Outlier rule.</b> {_e(report.outlier_rule)} Applied to every measure below '
                "and to the design efficiency of each contrast; flagged values are marked &#9650;.</div>",
                f'<div class="rule"><b>Temporal SNR.</b> {_e(report.tsnr_definition)}</div>',
                '<div class="figrow">' + "".join(render_figure(f, audits, size="wide" if n == 0 else "")
                                                 for n, f in enumerate(report.qc_figures)) + "</div>",
                '<p><label><input type="checkbox" id="only-flagged"> show flagged runs only</label></p>',
                render_run_table(report), source_line(report.qc_table, audits)]

    subjects = []
    for p in report.subject_pages:
        kept = sum(not r.qc.excluded for r in p.runs)
        flagged = sum(bool(r.qc.flags) for r in p.runs)
        subjects.append(f'<section class="card" id="subject-{_e(p.subject)}"><h3><a href="{_e(p.filename)}">'
                        f"sub-{_e(p.subject)}</a></h3><div class=\"note\">site {_e(p.site)}; {kept} of {len(p.runs)} "
                        f"run(s) kept; {flagged} run(s) with a flagged QC value; {len(p.maps)} contrast map(s); "
                        f"{len(p.warnings)} warning(s)</div></section>")

    body = "".join([
        '<section id="glance"><h2>At a glance</h2>', "".join(glance), "</section>",
        '<section id="settings"><h2>Settings</h2>', _settings_table(report), "</section>",
        '<section id="qc"><h2>Quality control across subjects and sites</h2>', "".join(qc_parts), "</section>",
        '<section id="contrasts"><h2>Contrasts</h2>', "".join(_contrast_block(c) for c in report.contrasts), "</section>",
        '<section id="group"><h2>Group results</h2>',
        "".join(_model_block(m, audits) for m in report.models) or '<p class="note">No group model.</p>', "</section>",
        '<section id="subjects"><h2>Subjects</h2>', "".join(subjects), "</section>",
    ])
    header = (f'<span class="meta">results: {_e(report.results_label)} &middot; glmsteps {_e(report.glmsteps_version)}'
              f' &middot; <a href="{_e(report.index.href)}">index.tsv</a></span>')
    return page(report.title, "".join(nav), body, header)


# ----------------------------------------------------------------------------
# a subject page
# ----------------------------------------------------------------------------

def _run_block(rs: RunSection, report: Report, audits: _Audits) -> str:
    r = rs.qc
    status = f"excluded: {r.reason}" if r.excluded else "kept"
    values = [f'<li>{_e(label)}: <b class="{"flagtext" if key in r.flags else ""}">{_e(_fmt(r.values.get(key, math.nan)))}'
              f'</b>{" &#9650; flagged" if key in r.flags else ""}</li>' for key, label in report.qc_measures]
    effs = [f"<li>efficiency {_e(c)}: {_e(_fmt(v))}{' &#9650; flagged' if f'efficiency:{c}' in r.flags else ''}</li>"
            for c, v in sorted(r.efficiency.items())]
    q = ", ".join(_fmt(x, 2) for x in r.ar_quantiles)
    parts = [f'<section class="card" id="run-{_e(r.run_id)}"><h3>{_e(r.run_id)}</h3>',
             f'<div class="note">status: {_e(status)}; site {_e(r.site)}</div>',
             '<ul class="tight">' + "".join(values) + "".join(effs)
             + f"<li>lag-1 AR coefficient 5/25/50/75/95 %: {_e(q)}</li>"
             + f"<li>motion from: {_e(r.motion_source)}</li></ul>",
             '<div class="figrow">' + "".join(render_figure(f, audits) for f in rs.figures) + "</div>",
             render_links(rs.links, audits)]
    parts += [f'<div class="warn">warning: {_e(w)}</div>' for w in rs.warnings]
    parts.append("</section>")
    return "".join(parts)


def render_subject_page(report: Report, subject: SubjectPage) -> str:
    """One subject's page."""
    audits = _Audits()
    nav = ['<a href="index.html">&larr; study page</a>', '<a href="#glance">At a glance</a>', '<a href="#runs">Runs</a>']
    nav += [f'<a class="sub" href="#run-{_e(r.qc.run_id)}">{_e(r.qc.run_id)}</a>' for r in subject.runs]
    nav.append('<a href="#maps">Contrast maps</a>')
    nav += [f'<a class="sub" href="#{_e(m.anchor)}">{_e(m.anchor[4:])}</a>' for m in subject.maps]
    nav.append('<a href="#warnings">Warnings</a>')
    kept = sum(not r.qc.excluded for r in subject.runs)
    glance = (f'<div class="glance"><div class="num"><b>{len(subject.runs)}</b>runs</div>'
              f'<div class="num"><b>{kept}</b>kept</div><div class="num"><b>{len(subject.maps)}</b>contrast maps</div>'
              f'<div class="num"><b>{len(subject.warnings)}</b>warnings</div></div>'
              f'<p class="note">site {_e(subject.site)}. The outlier flags compare each run with the runs of its site '
              f'(see the <a href="index.html#qc">study page</a> for the rule).</p>')
    runs = [r.qc for r in subject.runs]
    warnings = "".join(f'<div class="warn">{_e(w)}</div>' for w in subject.warnings) or \
        '<p class="note">No warning was recorded for this subject.</p>'
    body = "".join([
        '<section id="glance"><h2>At a glance</h2>', glance, render_run_table(report, False, runs), "</section>",
        '<section id="runs"><h2>Runs</h2>', "".join(_run_block(r, report, audits) for r in subject.runs), "</section>",
        '<section id="maps"><h2>Contrast maps</h2>',
        "".join(render_map_section(m, audits) for m in subject.maps) or '<p class="note">No subject-level map.</p>',
        "</section>",
        '<section id="warnings"><h2>Warnings</h2>', warnings, "</section>",
    ])
    header = (f'<span class="meta"><a href="index.html">study page</a> &middot; site {_e(subject.site)} &middot; '
              f"glmsteps {_e(report.glmsteps_version)}</span>")
    return page(f"sub-{subject.subject}", "".join(nav), body, header)
