"""The printed frame of an HTML report: page rules, a running head on every page, the review block.

One file, no script, no external reference. ``@page`` takes the paper the printer is given (A4
or Letter: ``size: auto``) with margins that fit both, and its margin boxes carry, on every
printed page, what the report is of (the session id, or the worksheet's file name) and "page n
of m" (CSS paged media counters, which Chromium prints in ``@page`` margin boxes). Rows, plots
and the review block are never split across pages, and long words wrap inside their cells.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from html import escape

from chargebook.acquire.protocol import CAUTION

#: Margins that fit A4 (210 mm × 297 mm) and Letter (215.9 mm × 279.4 mm) alike: the text block
#: is at most 182 mm wide (A4) and 243 mm high (Letter); plots are 148 mm (560 px) wide.
PAGE_MARGIN = "18mm 14mm 18mm 14mm"

STYLE = """
body { font-family: system-ui, sans-serif; margin: 2em auto; max-width: 60em; color: #111;
  overflow-wrap: break-word; }
h1 { font-size: 1.5em; margin-bottom: 0.2em; }
h2 { font-size: 1.15em; margin-top: 1.6em; border-bottom: 1px solid #999; break-after: avoid; }
table { border-collapse: collapse; margin: 0.5em 0; font-size: 0.9em; width: 100%; }
thead { display: table-header-group; }
tr, figure, .review, .result { break-inside: avoid; page-break-inside: avoid; }
th, td { border: 1px solid #bbb; padding: 0.2em 0.5em; text-align: left; vertical-align: top; }
th { background: #eee; }
td.num { text-align: right; white-space: nowrap; font-variant-numeric: tabular-nums; }
p.note { font-size: 0.85em; color: #444; margin: 0.2em 0; }
.caution { border: 2px solid #333; padding: 0.6em 0.8em; font-weight: 600; }
table.result { font-size: 1.05em; }
table.result td:first-child { width: 14em; font-weight: 600; }
.verdict-pass { font-weight: 700; }
.verdict-fail { font-weight: 700; color: #900; }
figure { margin: 0.8em 0; }
figcaption { font-size: 0.85em; }
svg.plot { background: #fff; max-width: 100%; height: auto; }
svg .axis { stroke: #333; }
svg .ref { stroke: #333; }
svg .band { fill: #dfe9df; }
svg .point { fill: #1f4e9a; stroke: #1f4e9a; }
svg .point.hollow { fill: #fff; }
svg .point.alarm { fill: #b00; stroke: #b00; }
svg text { font-size: 10px; fill: #333; }
tr.severity-warning td, tr.severity-error td { font-weight: 600; }
.review table { width: 100%; }
.review td.sign { height: 2.6em; width: 35%; }
.review th:first-child { width: 8em; }
@media print {
  body { margin: 0; max-width: none; font-size: 9.5pt; }
  h1 { font-size: 14pt; }
  h2 { font-size: 11.5pt; }
}
"""


def css_string(text: str) -> str:
    """Return ``text`` as a quoted CSS string (for an ``@page`` margin box's ``content``)."""
    quoted = text.replace("\\", "\\\\").replace('"', '\\"').replace("\n", " ")
    return f'"{quoted}"'


def page_rules(running_head: str, generated: str) -> str:
    """Return the ``@page`` rules: paper, margins, the running head and "page n of m"."""
    box = "font-family: system-ui, sans-serif; font-size: 8pt; color: #333;"
    return (
        f"@page {{ size: auto; margin: {PAGE_MARGIN};"
        f" @top-left {{ content: {css_string(running_head)}; {box} }}"
        f" @top-right {{ content: {css_string(generated)}; {box} }}"
        f" @bottom-left {{ content: {css_string(running_head)}; {box} }}"
        f' @bottom-right {{ content: "page " counter(page) " of " counter(pages); {box} }} }}'
    )


def page(title: str, running_head: str, generated: str, body: Sequence[str]) -> str:
    """Return one self-contained, printable HTML page: the caution at the top and the bottom.

    ``running_head`` is printed on every page (the session id, or the worksheet's name);
    ``generated`` says when and by which version the file was made (also on every page).
    """
    caution = f'<p class="caution" data-key="caution">{escape(CAUTION)}</p>'
    return "\n".join(
        [
            "<!DOCTYPE html>",
            '<html lang="en">',
            "<head>",
            '<meta charset="utf-8">',
            f"<title>{escape(title)}</title>",
            f"<style>{page_rules(running_head, generated)}{STYLE}</style>",
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


# ------------------------------------------------------------------------------ review block


@dataclass(frozen=True)
class SignOff:
    """A recorded review, as a review event gives it: who, ``decision`` (approved or rejected),
    their comment, and when, as it is to be printed (e.g. "2026-12-03 07:10:00 UTC");
    ``reviewer`` carries the self-review words when the reviewer measured it."""

    reviewer: str
    decision: str
    comment: str
    when: str


def review_block(measured_by: str, measured_on: str, review: SignOff | None) -> str:
    """Return the review block: measured by, reviewed by, dates, decision and signature lines.

    With no review (None) the reviewer's lines are empty, to be filled in by hand on paper.
    """
    blank = ""
    reviewer = blank if review is None else review.reviewer
    decision = "not yet reviewed" if review is None else review.decision
    reviewed_on = blank if review is None else review.when
    comment = blank if review is None else review.comment
    rows = [
        ("measured-by", "Measured by", measured_by, measured_on),
        ("reviewed-by", "Reviewed by", reviewer, reviewed_on),
    ]
    cells = "".join(
        f'<tr data-key="{key}"><th>{escape(role)}</th><td>{escape(name)}</td>'
        f'<td>{escape(date)}</td><td class="sign"></td></tr>'
        for key, role, name, date in rows
    )
    decision_row = (
        f'<tr data-key="decision"><th>Review</th><td colspan="3">{escape(decision)}'
        + (f": {escape(comment)}" if comment else "")
        + "</td></tr>"
    )
    head = "<thead><tr><th></th><th>name</th><th>date</th><th>signature</th></tr></thead>"
    return (
        '<section class="review" data-key="review">'
        "<h2>Review and sign-off</h2>"
        f"<table>{head}<tbody>{cells}{decision_row}</tbody></table>"
        '<p class="note">Sign only after checking the result, the flags and the audit above.</p>'
        "</section>"
    )
