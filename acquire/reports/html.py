"""Self-contained, printable HTML reports: one session, or a beam's output history.

One file, no script, no external reference: inline CSS and inline SVG figures, in the printed
frame of ``report_print`` (A4 or Letter, the session id and "page n of m" on every page). A
session's report says the result first (``report_result``), then the conditions (the session,
calibration and equipment, reference conditions, the MU per reading, the air), the factors, the
sets with a plot of each in % of its mean, the results in detail, the flags (most severe
first), the uncertainty budget, the audit in words and the review block; it carries the safety
caution at the top and the bottom. Rows carry ``data-key`` attributes and plot points ``data-``
values, so the figures can be read back by a program.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence

from chargebook.acquire.record.review import Review, reviewer_words
from chargebook.acquire.reports.audit import step_words
from chargebook.acquire.reports.data import SessionRecord, SetRecord
from chargebook.acquire.reports.printed import SignOff, page, review_block
from chargebook.acquire.reports.result import (
    deliveries_table,
    expanded_uncertainty_text,
    reference_conditions_table,
    result_table,
)
from chargebook.acquire.reports.sections import (
    NOT_GIVEN,
    Table,
    audit,
    budget,
    calibration,
    environment,
    factors,
    flags,
    identity,
    mu_per_reading_text,
    number,
    reading_sets,
    readings,
    results,
    set_stats,
    when,
)
from chargebook.acquire.reports.svg import Band, Line, Point, escape, plot
from chargebook.acquire.session.session_kind import OUTPUT_CHECK
from chargebook.corrections.evaluate import Evaluation
from chargebook.corrections.reading_scale import (
    deviations_from_mean_pct,
    recorded_resolution_nC,
    resolution_pct,
)

TYPE_CHECKING = False  # not typing's: a session's report needs no history (nor its imports)
if TYPE_CHECKING:
    from chargebook.acquire.reports.history import History


def table_html(table: Table) -> str:
    """Return ``table`` as an HTML section: heading, table and note."""
    parts = [f"<h2>{escape(table.title)}</h2>"]
    if table.rows:
        keys = table.keys or ("",) * len(table.rows)
        head = "".join(f"<th>{escape(h)}</th>" for h in table.headers)
        body = []
        for key, row in zip(keys, table.rows, strict=True):
            css = (
                f' class="severity-{escape(row[0].split()[-1])}"' if table.title == "Flags" else ""
            )
            cells = "".join(f"<td>{escape(cell)}</td>" for cell in row)
            body.append(f'<tr data-key="{escape(key)}"{css}>{cells}</tr>')
        css = f' class="{escape(table.extra["class"])}"' if "class" in table.extra else ""
        parts.append(
            f"<table{css}><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"
        )
    if table.note:
        parts.append(f'<p class="note">{escape(table.note)}</p>')
    return "\n".join(parts)


def readings_figure(
    title: str,
    charges_nC: Sequence[float],
    settling: Sequence[bool],
    mean_nC: float | None,
    attrs: Sequence[Mapping[str, str]],
    figure_attrs: str,
    caption_extra: str = "",
) -> str:
    """Return a figure of a set's readings (settling ones hollow) around their mean.

    With a mean, the y axis is each reading's deviation in % of the set mean and its tick
    labels have the decimals of the readings' resolution as recorded; without one (a leakage
    set, or no reading used) it is the charge in nC.
    """
    resolution_nC = recorded_resolution_nC(charges_nC)
    relative = mean_nC is not None and mean_nC != 0 and math.isfinite(mean_nC)
    if relative:
        assert mean_nC is not None
        ys = deviations_from_mean_pct(charges_nC, mean_nC)
        step_pct = None if resolution_nC is None else resolution_pct(resolution_nC, mean_nC)
        decimals = None if step_pct is None else max(0, math.ceil(-math.log10(step_pct)))
        lines = [Line(0.0, "", True)]  # the mean, stated in the caption: no label over a point
        y_label, scale = (
            "reading − mean (% of mean)",
            f"% of the set mean ({mean_nC:.4f} nC, dashed)",
        )
    else:
        ys, step_pct, decimals, lines = tuple(charges_nC), None, None, []
        y_label, scale = "charge (nC)", "charge in nC"
    points = [
        Point(x=float(i + 1), y=y, hollow=hollow, attrs={**extra, "plotted": repr(y)})
        for i, (y, hollow, extra) in enumerate(zip(ys, settling, attrs, strict=True))
    ]
    svg = plot(
        points,
        title=title,
        x_label="reading number",
        y_label=y_label,
        lines=lines,
        x_ticks=[(float(i + 1), str(i + 1)) for i in range(len(points))],
        y_decimals=decimals,
        y_min_step=step_pct or 0.0,
    )
    resolution = (
        ""
        if resolution_nC is None
        else f"; readings recorded to {resolution_nC:g} nC"
        + ("" if step_pct is None else f" ({step_pct:.2g} % of the mean)")
    )
    caption = (
        f"{escape(title)}. Axis: {scale}{escape(resolution)}. Filled: readings used; open: "
        f"settling readings{escape(caption_extra)}."
    )
    return f"<figure {figure_attrs}>{svg}<figcaption>{caption}</figcaption></figure>"


def set_figure(record: SessionRecord, reading_set: SetRecord) -> str:
    """Return a figure plotting a stored set's readings in % of its mean."""
    row = reading_set.row
    stats = set_stats(reading_set)
    mean = None if stats is None or row.purpose == "leakage" else stats.mean_nC
    title = (
        f"{step_words(row.step_index, row.purpose)} (set {row.id}): attempt {row.attempt}, "
        f"{row.bias_V:+g} V, {mu_per_reading_text(record, row.step_index)} per reading, "
        f"{row.status}"
    )
    spread = "" if stats is None else f"; relative SD {number(stats.relative_sd_pct, 3, '—')} %"
    reason = f"; reason: {row.reason}" if row.reason else ""
    attrs = [
        {
            "reading-id": str(r.id),
            "seq": str(r.seq),
            "charge-nc": repr(r.charge_nC),
            "settling": "1" if r.settling else "0",
        }
        for r in reading_set.readings
    ]
    return readings_figure(
        title,
        [r.charge_nC for r in reading_set.readings],
        [r.settling for r in reading_set.readings],
        mean,
        attrs,
        f'data-set-id="{row.id}"',
        spread + reason,
    )


def budget_with_coverage(table: Table, evaluation: Evaluation | None) -> Table:
    """Return the budget table with u_c, U, k and ν_eff stated under it."""
    if evaluation is None or evaluation.u_combined_pct is None:
        return table
    stated = (
        f" Combined standard uncertainty u_c = {evaluation.u_combined_pct:.2f} %; expanded "
        f"uncertainty U = {expanded_uncertainty_text(evaluation)}."
    )
    return dataclasses.replace(table, note=table.note + stated)


def recorded_sign_off(record: SessionRecord) -> SignOff | None:
    """Return the session's recorded review (``chargebook review``) as the review block shows
    it, or None while the session is unreviewed."""
    return sign_off(record.review)


def sign_off(review: Review | None) -> SignOff | None:
    """Return a recorded review (of a session or a visit) as the review block shows it: the
    reviewer marked when it was a self-review; None while unreviewed."""
    if review is None:
        return None
    return SignOff(reviewer_words(review), review.status, review.comment, when(review.reviewed_at))


def session_html(record: SessionRecord, generated: str, review: SignOff | None = None) -> str:
    """Return the session's report as one self-contained, printable HTML page.

    ``review``: the review for the review block; by default the recorded one
    (:func:`recorded_sign_off`), and empty signature lines while there is none.
    """
    review = review or recorded_sign_off(record)
    session, meta = record.session, record.metadata
    machine = meta.get("treatment_machine", NOT_GIVEN)
    beam = meta.get("beam", session.beam)
    operator = str(meta.get("operator", NOT_GIVEN))
    body = []
    warning = record.integrity_warning()
    if warning is not None:
        body.append(f'<p class="caution" data-key="integrity">{escape(warning)}</p>')
    missing = f"No results: {record.results_error}" if record.results_error else "No results."
    context = [
        ("session", "session", f"{session.id} ({session.status})"),
        ("review", "review", "not yet reviewed" if review is None else _review_words(review)),
        ("beam", "treatment machine and beam", f"{machine}, {beam}"),
        ("measured", "measured", f"{when(session.created_at)} by {operator}"),
    ]
    body.append(table_html(result_table(record.evaluation, missing, meta, context)))
    sections = [
        identity(record),
        calibration(record),
        reference_conditions_table(meta),
        deliveries_table(record.plan),
        environment(record),
        factors(record),
        reading_sets(record),
    ]
    body += [table_html(t) for t in sections]
    body += [
        set_figure(record, s) for s in record.sets if s.readings and s.row.purpose != "leakage"
    ]
    detail = dataclasses.replace(results(record), title="Results in detail")
    after = [
        readings(record),
        detail,
        flags(record),
        budget_with_coverage(budget(record), record.evaluation),
        audit(record),
    ]
    body += [table_html(t) for t in after]
    body.append(review_block(operator, when(session.created_at), review))
    title = f"chargebook session {session.id}: {machine} {beam}"
    running_head = f"chargebook session {session.id} · {machine} {beam}"
    return page(title, running_head, generated, body)


def _review_words(review: SignOff) -> str:
    return f"{review.decision} by {review.reviewer} on {review.when}"


def history_days(history: History) -> list[float]:
    """Return each session's date as days (fractional) after the first session's."""
    from datetime import datetime

    stamps = [datetime.fromisoformat(p.created_at) for p in history.points]
    return [(stamp - stamps[0]).total_seconds() / 86400 for stamp in stamps]


def history_html(history: History, history_table: Table, generated: str) -> str:
    """Return a beam's output history as one page: the plot against the band, then the table."""
    days = history_days(history)
    points = [
        Point(
            x=day,
            y=point.deviation_pct,
            alarm=not point.within_tolerance,
            hollow=point.kind == OUTPUT_CHECK,
            error=point.U_expanded_pct,
            attrs={
                "session-id": str(point.session_id),
                "kind": point.kind,
                "date": point.created_at[:10],
                "dose-per-mu-cgy": repr(point.dose_per_MU_cGy),
                "deviation-pct": repr(point.deviation_pct),
                "u-expanded-pct": repr(point.U_expanded_pct),
            },
        )
        for day, point in zip(days, history.points, strict=True)
        if point.deviation_pct is not None
    ]
    tolerance, action = history.tolerance_pct, history.action_pct
    action_lines = (
        []
        if action is None
        else [Line(action, f"action +{action:g} %", dashed=True), Line(-action, "", dashed=True)]
    )
    svg = plot(
        points,
        title=f"Output of {history.beam}: deviation from {history.baseline_label}",
        x_label="date (days from the first session)",
        y_label="deviation (%)",
        lines=[Line(0.0, "baseline"), *action_lines],
        bands=[] if tolerance is None else [Band(-tolerance, tolerance, f"±{tolerance:g} %")],
        x_ticks=[(day, p.created_at[:10]) for day, p in zip(days, history.points, strict=True)],
    )
    caption = (
        f"Dose per MU by session date, as a deviation from {escape(history.baseline_label)}, "
        "each with its expanded uncertainty as a bar; "
        + (f"the band is the ±{tolerance:g} % tolerance. " if tolerance is not None else "")
        + (f"Dashed lines: the ±{action:g} % action level. " if action is not None else "")
        + "Red points lie outside their session's tolerance. Filled points are full "
        "calibrations; hollow points are output checks, whose k_pol and k_s were carried."
    )
    figure = f'<figure data-key="history-plot">{svg}<figcaption>{caption}</figcaption></figure>'
    title = f"chargebook output history: {history.beam}"
    return page(title, title, generated, [figure, table_html(history_table)])
