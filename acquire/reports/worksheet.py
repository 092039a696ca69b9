"""The printable HTML report of a worksheet (``chargebook correct WORKSHEET --html``).

The same printed report as a session's (``report_html``): the result first, then the
conditions, the factors, the sets with plots in % of their means, the flags, the uncertainty
budget and the review block. A worksheet has no session id: its file name stands for it on
every printed page, and the report says so. It has no audit either: its readings were copied
from a logbook, with no record of how they were taken.
"""

from __future__ import annotations

from html import escape

from chargebook.acquire.reports.html import budget_with_coverage, readings_figure, table_html
from chargebook.acquire.reports.printed import SignOff, page, review_block
from chargebook.acquire.reports.result import reference_conditions_table, result_table
from chargebook.acquire.reports.sections import (
    NOT_GIVEN,
    Table,
    budget_of,
    factors_of,
    flags_of,
    keyed_table,
    number,
)
from chargebook.acquire.reports.summary_text import SET_NAMES, cross_check_rows
from chargebook.acquire.session.worksheet import Worksheet
from chargebook.corrections.conventions import constants
from chargebook.corrections.evaluate import Evaluation, MeasurementInputs


def set_bias_V(inputs: MeasurementInputs, key: str) -> float | None:
    """Return the signed bias (V) of a worksheet's set ("routine", "opposite", "reduced")."""
    routine, reduced = inputs.routine_bias_V, inputs.reduced_bias_V
    if routine is None:
        return None
    if key == "routine":
        return routine
    if key == "opposite":
        return -routine
    if reduced is None:
        return None
    return abs(reduced) if routine > 0 else -abs(reduced)


def _worksheet_table(worksheet: Worksheet, evaluation: Evaluation) -> Table:
    session = dict(worksheet.session)
    rows = [
        ("worksheet", "Worksheet", f"{worksheet.path.name} (a worksheet has no session id)"),
        ("convention", "Code of practice", constants(evaluation.convention).title),
        ("beam_type", "Beam type", evaluation.beam.value),
        *((key, key.replace("_", " ").capitalize(), str(value)) for key, value in session.items()),
    ]
    return keyed_table(
        "Worksheet",
        rows,
        "Readings copied from a logbook: there is no audit of how they were taken.",
    )


def _calibration_table(inputs: MeasurementInputs, evaluation: Evaluation) -> Table:
    u = inputs.uncertainties
    rows = [
        ("N_Dw_Gy_per_nC", "N_D,w", f"{number(inputs.N_Dw_Gy_per_nC, 5, NOT_GIVEN)} Gy/nC"),
        ("u_N_Dw_pct_k2", "U(N_D,w), k = 2", f"{number(u.u_N_Dw_pct_k2, 2, NOT_GIVEN)} %"),
        ("k_Q", "k_Q", number(inputs.k_Q, 4, NOT_GIVEN)),
        ("u_k_Q_pct", "u(k_Q)", f"{number(u.u_k_Q_pct, 2, NOT_GIVEN)} %"),
        ("k_elec", "k_elec", number(inputs.k_elec, 4, "not entered")),
        ("monitor_units", "MU per reading", f"{number(inputs.monitor_units, 0, NOT_GIVEN)} MU"),
        (
            "expected_cGy_per_MU",
            "Expected output",
            f"{number(inputs.expected_cGy_per_MU, 4, NOT_GIVEN)} cGy/MU",
        ),
    ]
    conversions = "; ".join(c.text() for c in evaluation.conversions)
    return keyed_table(
        "Calibration",
        rows,
        (f"Unit conversions: {conversions}. " if conversions else "")
        + "The same MU per reading for every set: k_pol and k_s are ratios of the sets' means.",
    )


def _environment_table(inputs: MeasurementInputs, evaluation: Evaluation) -> Table:
    rows = [
        (
            "worksheet",
            number(inputs.temperature_C, 2, NOT_GIVEN),
            number(inputs.pressure_kPa, 3, NOT_GIVEN),
            number(inputs.humidity_pct, 0, NOT_GIVEN),
        )
    ]
    rows += [
        (
            f"{SET_NAMES.get(key, key)} set",
            f"{air.temperature_C:.2f}",
            f"{air.pressure_kPa:.3f}",
            "",
        )
        for key, air in inputs.set_environments.items()
    ]
    return Table(
        "Environment",
        ("air of", "T (°C)", "P (kPa)", "RH (%)"),
        tuple(rows),
        ("environment", *(f"environment-{key}" for key in inputs.set_environments)),
        note="; ".join(
            f"{label}: {text}" for label, text in cross_check_rows(evaluation.to_dict())
        ),
    )


def _sets_table(worksheet: Worksheet, evaluation: Evaluation) -> Table:
    mu = number(worksheet.inputs.monitor_units, 0, NOT_GIVEN)
    rows = []
    for key, stats in evaluation.sets.items():
        bias = set_bias_V(worksheet.inputs, key)
        rows.append(
            (
                SET_NAMES.get(key, key),
                NOT_GIVEN if bias is None else f"{bias:+g} V",
                f"{mu} MU",
                str(0 if stats is None else stats.count),
                number(None if stats is None else stats.mean_nC, 4, NOT_GIVEN),
                number(None if stats is None else stats.relative_sd_pct, 3, NOT_GIVEN),
            )
        )
    return Table(
        "Reading sets",
        ("set", "bias", "MU per reading", "readings", "mean (nC)", "rel. SD (%)"),
        tuple(rows),
        tuple(f"set-{key}" for key in evaluation.sets),
    )


def _figures(worksheet: Worksheet, evaluation: Evaluation) -> list[str]:
    figures = []
    for key, stats in evaluation.sets.items():
        charges = list(getattr(worksheet.inputs, f"{key}_nC"))
        if not charges:
            continue
        bias = set_bias_V(worksheet.inputs, key)
        title = f"{SET_NAMES.get(key, key).capitalize()} set" + (
            "" if bias is None else f", {bias:+g} V"
        )
        attrs = [
            {"set": key, "reading": str(i + 1), "charge-nc": repr(q)} for i, q in enumerate(charges)
        ]
        figures.append(
            readings_figure(
                title,
                charges,
                [False] * len(charges),
                None if stats is None else stats.mean_nC,
                attrs,
                f'data-set-key="{escape(key)}"',
            )
        )
    return figures


def worksheet_html(
    worksheet: Worksheet, evaluation: Evaluation, generated: str, review: SignOff | None = None
) -> str:
    """Return the worksheet's report as one self-contained, printable HTML page."""
    session = worksheet.session
    name = worksheet.path.name
    context = [
        (
            "worksheet",
            "worksheet",
            f"{name} (no session id: the file name stands for it on every page)",
        ),
        (
            "beam",
            "treatment machine and beam",
            f"{session.get('machine', NOT_GIVEN)}, "
            f"{session.get('beam_quality', evaluation.beam.value)}",
        ),
        (
            "measured",
            "measured",
            f"{session.get('date', NOT_GIVEN)} by {session.get('operator', NOT_GIVEN)}",
        ),
    ]
    body = [
        table_html(result_table(evaluation, "No results.", {}, context)),
        table_html(_worksheet_table(worksheet, evaluation)),
        table_html(_calibration_table(worksheet.inputs, evaluation)),
        table_html(reference_conditions_table({})),
        table_html(_environment_table(worksheet.inputs, evaluation)),
        table_html(factors_of(evaluation)),
        table_html(_sets_table(worksheet, evaluation)),
        *_figures(worksheet, evaluation),
        table_html(flags_of(evaluation)),
        table_html(budget_with_coverage(budget_of(evaluation), evaluation)),
        review_block(str(session.get("operator", "")), str(session.get("date", "")), review),
    ]
    title = f"chargebook worksheet {name}"
    return page(title, f"chargebook worksheet {name}", generated, body)
