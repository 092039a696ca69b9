"""Self-contained, printable HTML reports: one session, or a beam's output history.

One file, no script, no external reference: inline CSS and inline SVG figures. The report
shows the same sections as ``chargebook show`` (see ``report_sections``) plus a plot of each
reading set, and carries the safety caution at the top and the bottom. Rows carry ``data-key``
attributes and plot points ``data-`` values, so the figures can be read back by a program.
"""

from __future__ import annotations

from collections.abc import Sequence
from html import escape

from chargebook.acquire.cli import CAUTION
from chargebook.acquire.history import History
from chargebook.acquire.report_data import SessionRecord, SetRecord
from chargebook.acquire.report_sections import Table, all_sections, number, set_stats
from chargebook.acquire.report_svg import Band, Line, Point, plot

STYLE = """
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 60em; color: #111; }
h1 { font-size: 1.5em; margin-bottom: 0.2em; }
h2 { font-size: 1.15em; margin-top: 1.6em; border-bottom: 1px solid #999; }
table { border-collapse: collapse; margin: 0.5em 0; font-size: 0.9em; }
th, td { border: 1px solid #bbb; padding: 0.2em 0.5em; text-align: left; vertical-align: top; }
th { background: #eee; }
p.note { font-size: 0.85em; color: #444; margin: 0.2em 0; }
.caution { border: 2px solid #333; padding: 0.6em 0.8em; font-weight: 600; }
figure { margin: 0.8em 0; page-break-inside: avoid; }
figcaption { font-size: 0.85em; }
svg.plot { background: #fff; }
svg .axis { stroke: #333; }
svg .ref { stroke: #333; }
svg .band { fill: #dfe9df; }
svg .point { fill: #1f4e9a; stroke: #1f4e9a; }
svg .point.hollow { fill: #fff; }
svg .point.alarm { fill: #b00; stroke: #b00; }
svg text { font-size: 10px; fill: #333; }
tr.severity-warning td, tr.severity-error td { font-weight: 600; }
@media print { body { margin: 0; max-width: none; } h2 { page-break-after: avoid; } }
"""


def _page(title: str, generated: str, body: Sequence[str]) -> str:
    caution = f'<p class="caution" data-key="caution">{escape(CAUTION)}</p>'
    return "\n".join(
        [
            "<!DOCTYPE html>",
            '<html lang="en">',
            "<head>",
            '<meta charset="utf-8">',
            f"<title>{escape(title)}</title>",
            f"<style>{STYLE}</style>",
            "</head>",
            "<body>",
            f"<h1>{escape(title)}</h1>",
            f'<p class="note">{escape(generated)}</p>',
            caution,
            *body,
            caution,
            "</body>",
            "</html>",
        ]
    )


def table_html(table: Table) -> str:
    """Return ``table`` as an HTML section: heading, table and note."""
    parts = [f"<h2>{escape(table.title)}</h2>"]
    if table.rows:
        keys = table.keys or ("",) * len(table.rows)
        head = "".join(f"<th>{escape(h)}</th>" for h in table.headers)
        body = []
        for key, row in zip(keys, table.rows, strict=True):
            css = f' class="severity-{escape(row[0])}"' if table.title == "Flags" else ""
            cells = "".join(f"<td>{escape(cell)}</td>" for cell in row)
            body.append(f'<tr data-key="{escape(key)}"{css}>{cells}</tr>')
        parts.append(f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>")
    if table.note:
        parts.append(f'<p class="note">{escape(table.note)}</p>')
    return "\n".join(parts)


def set_figure(reading_set: SetRecord) -> str:
    """Return a figure plotting a set's readings (settling ones hollow) and their mean."""
    row = reading_set.row
    points = [
        Point(
            x=float(reading.seq),
            y=reading.charge_nC,
            hollow=reading.settling,
            attrs={
                "reading-id": str(reading.id),
                "seq": str(reading.seq),
                "charge-nc": repr(reading.charge_nC),
                "settling": "1" if reading.settling else "0",
            },
        )
        for reading in reading_set.readings
    ]
    stats = set_stats(reading_set)
    lines = [] if stats is None else [Line(stats.mean_nC, f"mean {stats.mean_nC:.4f} nC", True)]
    title = f"Set {row.id}: {row.step_key}, attempt {row.attempt}, {row.bias_V:+g} V, {row.status}"
    svg = plot(
        points,
        title=title,
        x_label="reading number",
        y_label="charge (nC)",
        lines=lines,
        x_ticks=[(float(r.seq), str(r.seq)) for r in reading_set.readings],
    )
    spread = "" if stats is None else f"; relative SD {number(stats.relative_sd_pct, 3, '—')} %"
    caption = (
        f"{escape(title)}. Filled: readings used; open: settling readings"
        f"{escape(spread)}{'; reason: ' + escape(row.reason) if row.reason else ''}."
    )
    return f'<figure data-set-id="{row.id}">{svg}<figcaption>{caption}</figcaption></figure>'


def session_html(record: SessionRecord, generated: str) -> str:
    """Return the session's report as one self-contained, printable HTML page."""
    body = []
    warning = record.integrity_warning()
    if warning is not None:
        body.append(f'<p class="caution" data-key="integrity">{escape(warning)}</p>')
    for table in all_sections(record):
        body.append(table_html(table))
        if table.title == "Reading sets":
            body += [set_figure(s) for s in record.sets if s.readings]
    session = record.session
    title = f"chargebook session {session.id}: {record.metadata.get('treatment_machine', '')} " + (
        f"{record.metadata.get('beam', session.beam)}"
    )
    return _page(title, generated, body)


def history_html(history: History, history_table: Table, generated: str) -> str:
    """Return a beam's output history as one page: the plot against the band, then the table."""
    points = [
        Point(
            x=float(index),
            y=point.deviation_pct,
            alarm=not point.within_tolerance,
            attrs={
                "session-id": str(point.session_id),
                "dose-per-mu-cgy": repr(point.dose_per_MU_cGy),
                "deviation-pct": repr(point.deviation_pct),
            },
        )
        for index, point in enumerate(history.points)
        if point.deviation_pct is not None
    ]
    tolerance = history.tolerance_pct
    svg = plot(
        points,
        title=f"Output of {history.beam}: deviation from {history.baseline_label}",
        x_label="session",
        y_label="deviation (%)",
        lines=[Line(0.0, "baseline")],
        bands=[] if tolerance is None else [Band(-tolerance, tolerance, f"±{tolerance:g} %")],
        x_ticks=[(float(i), str(p.session_id)) for i, p in enumerate(history.points)],
    )
    caption = (
        f"Dose per MU by session, as a deviation from {escape(history.baseline_label)}; "
        + (f"the band is the ±{tolerance:g} % tolerance. " if tolerance is not None else "")
        + "Red points lie outside their session's tolerance."
    )
    figure = f'<figure data-key="history-plot">{svg}<figcaption>{caption}</figcaption></figure>'
    title = f"chargebook output history: {history.beam}"
    return _page(title, generated, [figure, table_html(history_table)])
