"""The page: the self-contained HTML report, its PNG files and the overview sheet."""

from __future__ import annotations

import base64
import html
import io
import math
import re
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from autotune.errors import JournalError
from autotune.report.build import Report, ReportFigure, build_report
from autotune.report.figures.base import DPI, new_figure
from autotune.report.flags import fit_p_value
from autotune.report.model import (FIGURE_NAME, HTML_NAME, Run, level_label,
                                   measured_duration_text, number_at)
from autotune.report.text import page_notes, format_text
from autotune.wire.rig import FIELDS

_CSS = """
body { font-family: sans-serif; margin: 1em auto; max-width: 1500px; padding: 0 1em;
       color: #222; }
h1 { font-size: 1.4em; } h2 { font-size: 1.2em; border-bottom: 1px solid #ccc; }
.notices { background: #fdecea; border: 3px solid #c62828; padding: 0.4em 1em;
           margin: 0.8em 0; }
.notices h2 { border: none; color: #b71c1c; margin: 0.3em 0; }
.notices h3 { font-size: 1em; margin: 0.6em 0 0.2em; }
.notices p { margin: 0.2em 0 0.6em; }
.flags { background: #fff4e5; border: 2px solid #e08a00; padding: 0.4em 1em; }
.flags.clear { background: #eef7ee; border-color: #4a9a4a; }
.flags li { margin: 0.2em 0; }
nav.contents { background: #f6f6f6; padding: 0.3em 1em; font-size: 0.9em; }
nav.contents ul { margin: 0.2em 0; padding-left: 1.2em; }
nav.contents > ul { columns: 2; }
nav.contents li { break-inside: avoid; }
table { border-collapse: collapse; font-size: 0.85em; }
td, th { padding: 0.15em 0.6em; border-bottom: 1px solid #eee; text-align: left; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
.figs { display: grid; gap: 1em 1.5em; align-items: start;
        grid-template-columns: repeat(auto-fill, minmax(min(100%, 560px), 1fr)); }
.figs figure.wide { grid-column: 1 / -1; }
figure { margin: 0.5em 0; }
figure img { width: 100%; height: auto; border: 1px solid #ddd; }
figure.wide img { max-width: 980px; }
figcaption { font-size: 0.82em; color: #444; }
figcaption b { color: #222; }
.meta { color: #666; font-size: 0.85em; }
"""

#: Titles of the figures on the page and in its contents.
FIGURE_TITLES = {
    "timeline": "Timeline of the folder", "night": "The night",
    "fringes": "Fringes at the chosen set-points", "phase-shift": "Why this detuning",
    "absorption": "Why this velocity", "map": "Where it measured",
    "scan": "Detuning steps", "progress": "Inversion against shots"}
#: Figures drawn across the page (tall or time-long).
WIDE_FIGURES = frozenset({"timeline", "night"})


def _esc(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _figure_id(fig: ReportFigure) -> str:
    return f"fig-{fig.section or 'run'}-{fig.key}"


def _figure_html(fig: ReportFigure) -> str:
    data = base64.b64encode(fig.png).decode("ascii")
    title = FIGURE_TITLES.get(fig.key, fig.key)
    wide = ' class="wide"' if fig.key in WIDE_FIGURES else ""
    return (f'<figure id="{_esc(_figure_id(fig))}"{wide}>'
            f'<img alt="{_esc(title)}" src="data:image/png;base64,{data}">'
            f"<figcaption><b>{_esc(title)}.</b> {_esc(fig.caption)}</figcaption></figure>")


def _figures_html(figures: Sequence[ReportFigure]) -> str:
    return '<div class="figs">' + "".join(_figure_html(f) for f in figures) + "</div>"


def _contents_html(report: Report, names: Sequence[str], lead: Sequence[ReportFigure]) -> str:
    def figure_links(figs: Sequence[ReportFigure]) -> str:
        return "".join(f'<li><a href="#{_esc(_figure_id(f))}">{_esc(FIGURE_TITLES.get(f.key, f.key))}'
                       "</a></li>" for f in figs)

    items = (['<li><a href="#notices">Read this first</a></li>'] if report.notices else [])
    items.append('<li><a href="#flags">Look at this</a></li>')
    if report.multi:
        items.append('<li><a href="#runs">Runs</a></li>')
        items.append(figure_links(lead))
    for name, run in zip(names, report.runs, strict=True):
        section = name if report.multi else ""
        figs = [f for f in report.figures if f.section == section and f not in lead]
        items.append(f'<li><a href="#run-{_esc(_anchor(name))}">{_esc(name)}</a> '
                     f"({_esc(run.command)}, {_esc(run.status)})"
                     f"<ul>{figure_links(figs)}</ul></li>")
    return f'<nav class="contents"><b>Contents</b><ul>{"".join(items)}</ul></nav>'


def _anchor(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_-]", "-", name)


def _notices_html(report: Report) -> str:
    """The box at the top: a run still going, a damaged journal (empty when there is none)."""
    if not report.notices:
        return ""
    items = "".join(f'<div class="notice {_esc(n.kind)}"><h3>{_esc(n.title)}</h3>'
                    f"<p>{_esc(n.page)}</p></div>" for n in report.notices)
    return (f'<section id="notices" class="notices" role="alert"><h2>Read this first</h2>'
            f"{items}</section>")


def _flags_html(report: Report) -> str:
    flags = report.all_flags
    if not flags:
        return ('<section id="flags" class="flags clear"><h2>Look at this</h2>'
                '<p>nothing flagged</p></section>')
    items = "".join(f"<li><b>{_esc(name + ': ') if report.multi else ''}</b>{_esc(f.text)}</li>"
                    for name, f in flags)
    return f'<section id="flags" class="flags"><h2>Look at this</h2><ul>{items}</ul></section>'


def _table_html(run: Run) -> str:
    rows = []
    for m in run.estimated:
        p = min((fit_p_value(m.value(f"chi2_{f}"), int(m.value(f"dof_{f}") or 0))
                 for f in FIELDS), default=math.nan)
        cells = [m.label, m.point, f"{m.setpoints.get('velocity', math.nan):.1f}",
                 f"{m.setpoints.get('detuning', math.nan) / 1e3:+.2f}",
                 f"{m.value('inversion'):.3f}",
                 f"[{m.value('inversion_low'):.3f}, {m.value('inversion_high'):.3f}]",
                 f"{m.value('phase_shift') / math.pi:.3f} ± "
                 f"{m.value('phase_shift_stderr') / math.pi:.3f}",
                 f"{m.value('absorption'):.3f}", f"{p:.2g}", f"{m.shots_after:,}"]
        rows.append("<tr>" + "".join(f'<td class="num">{_esc(c)}</td>' for c in cells) + "</tr>")
    head = ("<tr><th>label</th><th>#</th><th>velocity (m/s)</th><th>detuning (kHz)</th>"
            f"<th>inversion</th><th>{_esc(level_label(run.confidence))} interval</th>"
            "<th>phase shift (π rad)</th><th>absorption</th><th>fit p</th>"
            "<th>cumulative shots</th></tr>")
    return (f"<details><summary>measurements ({len(rows)})</summary>"
            f"<table>{head}{''.join(rows)}</table></details>")


def _decisions_html(run: Run) -> str:
    items = "".join(f"<li><b>{_esc(d['what'])}</b>: {_esc(d['reason'])}</li>"
                    for d in run.decisions)
    return f"<details><summary>decisions ({len(run.decisions)})</summary><ul>{items}</ul></details>"


def render_html(report: Report) -> str:
    """The self-contained page: inline CSS, figures as data URIs, no script, no network."""
    names = list(report.headers)
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>autotune report: {_esc(report.path.name)}</title>",
             f"<style>{_CSS}</style></head><body>",
             f"<h1>autotune report: {_esc(report.path)}</h1>",
             f'<p class="meta">written {_esc(datetime.now(UTC).isoformat(timespec="seconds"))}'
             " from the run files (read only; no rig was contacted)</p>",
             _notices_html(report), _flags_html(report)]
    lead = [f for f in report.figures if f.section == ""] if report.multi else []
    parts.append(_contents_html(report, names, lead))
    if report.multi:
        head = ("<tr><th>run</th><th>command</th><th>status</th><th>verified inversion</th>"
                "<th>chosen set-points</th><th>shots</th><th>rig time</th></tr>")
        rows = []
        for name, run in zip(names, report.runs, strict=True):
            hdr = dict(report.headers[name])
            rows.append("<tr>" + "".join(f"<td>{_esc(c)}</td>" for c in (
                name, run.command, run.status, hdr.get("verified inversion", "-"),
                hdr.get("chosen set-points", "-"),
                f"{int(number_at(run.result or {}, 'shots', default=run.shots)):,}",
                measured_duration_text(number_at(run.result or {}, "rig_time_s",
                                                 default=run.rig_time_s)))) + "</tr>")
        parts.append(f'<section id="runs"><h2>Runs</h2><table>{head}{"".join(rows)}</table>'
                     "</section>")
        if lead:
            parts.append(_figures_html(lead))
    for name, run in zip(names, report.runs, strict=True):
        section = name if report.multi else ""
        parts.append(f'<section id="run-{_esc(_anchor(name))}"><h2>{_esc(name)}</h2>')
        parts.append('<table class="header">' + "".join(
            f"<tr><th>{_esc(k)}</th><td>{_esc(v)}</td></tr>" for k, v in report.headers[name])
            + f"<tr><th>folder</th><td>{_esc(run.path)}</td></tr></table>")
        if report.multi:
            own = report.flags[name]
            if own:
                parts.append("<ul>" + "".join(f"<li>{_esc(f.text)}</li>" for f in own) + "</ul>")
        figs = [f for f in report.figures if f.section == section and f not in lead]
        if figs:
            parts.append(_figures_html(figs))
        else:
            parts.append("<p>no figure: nothing measured yet</p>")
        parts.append(_table_html(run))
        parts.append(_decisions_html(run))
        for note in page_notes(run):
            parts.append(f'<p class="meta">note: {_esc(note)}</p>')
        parts.append("</section>")
    parts.append("</body></html>")
    return "\n".join(parts)



def _png(fig: Any) -> bytes:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=DPI)
    return buffer.getvalue()


#: The figures of each run on the overview sheet: the decision, then how good it was.
_SHEET_KEYS = ("night", "phase-shift", "absorption", "fringes")
_SHEET_MAX_ROWS = 5


def _sheet_rows(report: Report) -> list[list[ReportFigure]]:
    """The overview's rows: the folder's own figures, then one row per run with its decision
    figures (the night, or phase shift and absorption) and its fringes; with many runs only the
    latest rows fit."""
    lead = [f for f in report.figures if f.section == ""] if report.multi else []
    sections = list(dict.fromkeys(f.section for f in report.figures if f not in lead))
    rows = [lead] if lead else []
    for section in sections[-max(_SHEET_MAX_ROWS - len(rows), 1):]:
        own = [f for f in report.figures if f.section == section and f not in lead]
        picked = [f for key in _SHEET_KEYS for f in own if f.key == key][:3]
        rows.append(picked or own[:1])
    return rows


def _overview_sheet(rows: Sequence[Sequence[ReportFigure]], path: Path) -> None:
    """Tile already rendered PNGs into one image, a row of tiles per run."""
    import matplotlib.image as mpimg

    columns = max(len(row) for row in rows)
    sheet = new_figure(6.0 * columns, 4.2 * len(rows))
    grid = sheet.add_gridspec(len(rows), columns)
    for r, row in enumerate(rows):
        for c, fig in enumerate(row):
            # A row's single figure (the folder's timeline) takes the whole row.
            ax = sheet.add_subplot(grid[r, :] if len(row) == 1 else grid[r, c])
            ax.imshow(mpimg.imread(io.BytesIO(fig.png), format="png"))
            ax.set_axis_off()
    sheet.savefig(path, dpi=DPI)


def _write_bytes(path: Path, data: bytes) -> None:
    try:
        path.write_bytes(data)
    except OSError as exc:
        raise JournalError(f"cannot write {path}: {exc} (write elsewhere with --out DIR)") from exc


def write_report(run_dir: Path, *, plot: bool = True, out: Path | None = None) -> str:
    """Report ``run_dir``; with ``plot``, write its figures, overview and HTML page.

    Parameters
    ----------
    run_dir : Path
        A run folder, a dry run's output folder or a ``track`` folder.
    plot : bool
        False: text only, nothing is written.
    out : Path, optional
        Folder for the figures and the page (default: ``run_dir``; created if missing).

    Returns
    -------
    str
        The text summary, ending with the paths written.

    Raises
    ------
    JournalError
        Not a run folder, missing or damaged files, or an output that cannot be written.
    """
    run_dir = Path(run_dir)
    report = build_report(run_dir, draw=plot)
    text = format_text(report)
    if not plot:
        return text
    target = Path(out) if out is not None else run_dir
    try:
        target.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise JournalError(f"cannot create {target}: {exc} (write elsewhere with --out DIR)") \
            from exc
    for fig in report.figures:
        fig.png = _png(fig.figure)
        stem = "-".join(s for s in ("report", _safe(fig.section), fig.key) if s)
        fig.file = target / f"{stem}.png"
        _write_bytes(fig.file, fig.png)
    page = target / HTML_NAME
    _write_bytes(page, render_html(report).encode("utf-8"))
    lines = [text, ""]
    if report.figures:
        sheet = _sheet_rows(report)
        try:
            _overview_sheet(sheet, target / FIGURE_NAME)
        except OSError as exc:
            raise JournalError(f"cannot write {target / FIGURE_NAME}: {exc} (write elsewhere "
                               "with --out DIR)") from exc
        lines.append(f"figures: {len(report.figures)} in {target} "
                     f"({', '.join(f.file.name for f in report.figures[:6])}"
                     f"{', ...' if len(report.figures) > 6 else ''}); overview {FIGURE_NAME}")
    lines.append(f"page: {page}")
    return "\n".join(lines)


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]", "-", name)
