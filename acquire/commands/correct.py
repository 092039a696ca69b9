"""`chargebook correct WORKSHEET [--json | --html] [-o FILE]`: the offline mode, for readings
copied from a logbook.

Reads a TOML or JSON worksheet (see ``chargebook.acquire.session.worksheet``), evaluates it with
``chargebook.corrections.evaluate`` and prints a table of every factor, the reading-set
statistics, the corrected charge, the dose, the uncertainty budget and the flags, or with
``--json`` one JSON object, or with ``--html`` the printable report a session's export gives
(``report_worksheet``). ``-o FILE`` writes to a file instead of stdout. Exit 0 on success, 2 on
invalid input with the message on stderr.
"""

from __future__ import annotations

import argparse
import sys

TYPE_CHECKING = False  # not typing's: `chargebook --help` imports no typing (DEVELOPERS.md)
if TYPE_CHECKING:
    from typing import Any

    from chargebook.acquire.session.worksheet import Worksheet
    from chargebook.corrections.evaluate import Evaluation

HELP = "correct readings copied from a logbook: factors, dose and uncertainty from a worksheet"


SET_TITLES = {"routine": "routine", "opposite": "opposite polarity", "reduced": "reduced bias"}


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the worksheet path, the --json and --html switches and -o FILE."""
    from chargebook.acquire.commands.station_reader import add_output_argument

    parser.add_argument(
        "worksheet",
        metavar="WORKSHEET",
        help="a .toml or .json worksheet, or - to read one from stdin (TOML, or JSON when it "
        "starts with {)",
    )
    output = parser.add_mutually_exclusive_group()
    output.add_argument("--json", action="store_true", help="print one JSON object instead")
    output.add_argument(
        "--html",
        action="store_true",
        help="print a self-contained printable HTML report instead (the worksheet's file name "
        "stands for a session id)",
    )
    add_output_argument(parser)


def _number(value: float | None, digits: int = 5, unit: str = "", missing: str = "—") -> str:
    """Return a computed value to ``digits`` significant digits, trailing zeros kept (14.7490 nC
    says five digits; 14.749 would say four)."""
    if value is None:
        return missing
    text = f"{value:#.{digits}g}" if abs(value) >= 1e-3 or value == 0 else f"{value:.4e}"
    return f"{text} {unit}".rstrip()


def _fixed(value: float | None, digits: int = 3, signed: bool = False, missing: str = "—") -> str:
    if value is None:
        return missing
    return f"{value:+.{digits}f}" if signed else f"{value:.{digits}f}"


def _table(rows: list[list[str]], indent: str = "  ") -> list[str]:
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    return [
        indent
        + "  ".join(cell.ljust(width) for cell, width in zip(row, widths, strict=True)).rstrip()
        for row in rows
    ]


def _header(worksheet: Worksheet, evaluation: Evaluation) -> list[str]:
    from chargebook.corrections.beam_quality import quality_text
    from chargebook.corrections.conventions import constants

    reference = constants(evaluation.convention)
    lines = [
        f"chargebook correct: {worksheet.path.name}",
        f"convention   {reference.title} (air referred to {reference.reference_temperature_C:g} °C,"
        f" {reference.reference_pressure_kPa:g} kPa); beam {evaluation.beam.value}",
        f"modality     {evaluation.quality.modality}"
        + (f"; {text}" if (text := quality_text(evaluation.quality)) else ""),
    ]
    lines += [f"{key.replace('_', ' '):<12} {value}" for key, value in worksheet.session.items()]
    if evaluation.conversions:
        lines += ["", "Input conversions"]
        lines += [f"  {conversion.text()}" for conversion in evaluation.conversions]
    return lines


def _bias_text(worksheet: Worksheet, key: str) -> str:
    inputs = worksheet.inputs
    routine, reduced = inputs.routine_bias_V, inputs.reduced_bias_V
    if routine is None:
        return ""
    if key == "routine":
        return f" ({routine:+g} V)"
    if key == "opposite":
        return f" ({-routine:+g} V)"
    if reduced is None:
        return ""
    return f" ({abs(reduced) if routine > 0 else -abs(reduced):+g} V)"


def _sets(worksheet: Worksheet, evaluation: Evaluation) -> list[str]:
    rows = [
        ["set", "n", "mean nC", "SD nC", "rel SD %", "SE nC", "range %", "drift %/rdg", "outliers"]
    ]
    for key, stats in evaluation.sets.items():
        name = SET_TITLES[key] + _bias_text(worksheet, key)
        if stats is None:
            rows.append([name, "0", "no readings", "", "", "", "", "", ""])
            continue
        outliers = ", ".join(str(i + 1) for i in stats.outliers) or "none"
        rows.append(
            [
                name,
                str(stats.count),
                f"{stats.mean_nC:.4f}",
                _fixed(stats.sd_nC, 5, missing="undefined"),
                _fixed(stats.relative_sd_pct),
                _fixed(stats.standard_error_nC, 5, missing="undefined"),
                _fixed(stats.relative_range_pct),
                _fixed(stats.drift_pct_per_reading, signed=True),
                outliers,
            ]
        )
    lines = ["", "Reading sets (charges as read)", *_table(rows)]
    check = evaluation.return_check
    if check is not None:
        lines.append(
            f"  return check: {check.stats.count} readings, mean {check.stats.mean_nC:.4f} nC, "
            f"ratio to routine {check.ratio:.5f} ({check.deviation_pct:+.3f} %)"
            + ("" if check.air_scale == 1.0 else ", its mean referred to the routine set's air")
        )
    return lines


def _factors(evaluation: Evaluation) -> list[str]:
    rows = [["symbol", "value", "state", "u %", "source"]]
    for factor in evaluation.factors.values():
        value = "pending" if factor.value is None else f"{factor.value:.5f}"
        if factor.value is not None and factor.value < 0.01:
            value = f"{factor.value:.5g}"
        u = "—" if factor.u_rel_pct is None else f"{factor.u_rel_pct:.3f}"
        rows.append([factor.symbol, value, factor.state, u, factor.source])
    return ["", "Factors", *_table(rows)]


def _results(evaluation: Evaluation) -> list[str]:
    symbols = evaluation.symbols
    pending = "pending (a factor above is pending)"
    rows = [
        [
            f"{symbols['M_raw']} (mean routine)",
            _number(evaluation.M_raw_nC, 6, "nC", "no readings"),
        ],
        [
            f"{symbols['M_corrected']} (corrected)",
            _number(evaluation.M_corrected_nC, 6, "nC", pending),
        ],
        [f"{symbols['dose']} (dose to water)", _number(evaluation.dose_Gy, 5, "Gy", pending)],
        ["dose per MU", _number(evaluation.dose_per_MU_cGy, 5, "cGy/MU", "— (needs dose and MU)")],
    ]
    if evaluation.expected_cGy_per_MU is not None:
        rows.append(["expected", f"{evaluation.expected_cGy_per_MU:g} cGy/MU (as entered)"])
    if evaluation.deviation_pct is not None:
        verdict = "within tolerance" if evaluation.within_tolerance else "OUTSIDE tolerance"
        rows.append(
            [
                "deviation",
                f"{evaluation.deviation_pct:+.2f} %  (tolerance ±{evaluation.tolerance_pct:g} %, "
                f"{evaluation.tolerance_source}): {verdict}",
            ]
        )
    from chargebook.acquire.reports.summary_text import cross_check_rows

    rows += [[label, text] for label, text in cross_check_rows(evaluation.to_dict())]
    return ["", "Results", *_table(rows)]


def _coverage_text(evaluation: Evaluation) -> str:
    from chargebook.corrections.student_t import dof_text

    return (
        f"ν_eff = {dof_text(evaluation.effective_dof)} (Welch–Satterthwaite), "
        f"k = {evaluation.coverage_factor:.2f} (Student's t, coverage probability "
        f"{100 * evaluation.coverage_probability:g} %)"
    )


def _uncertainty(evaluation: Evaluation) -> list[str]:
    lines = ["", "Uncertainty budget (GUM; relative standard uncertainty contributions)"]
    if not evaluation.budget:
        return [*lines, "  no routine readings yet"]
    rows = [["component", "u %", "source"]]
    rows += [
        [c.component, "—" if c.u_rel_pct is None else f"{c.u_rel_pct:.3f}", c.source]
        for c in evaluation.budget
    ]
    lines += _table(rows)
    u_c, U, u_charge = (
        evaluation.u_combined_pct,
        evaluation.U_expanded_pct,
        evaluation.u_M_corrected_pct,
    )
    if u_c is None:
        if u_charge is None:
            lines.append(
                "  combined standard uncertainty: cannot be evaluated yet (a factor is pending "
                "or a set has a single reading)"
            )
        else:
            lines.append(f"  u_c of the corrected charge = {u_charge:.3f} %")
            lines.append("  combined standard uncertainty of the dose: cannot be evaluated yet")
        return lines
    lines.append(f"  combined standard uncertainty of the dose  u_c = {u_c:.3f} %")
    lines.append(f"  expanded uncertainty U = k u_c = {U:.3f} %")
    lines.append(f"  {_coverage_text(evaluation)}")
    check = evaluation.monte_carlo()
    u_mc = "" if check.u_combined_pct is None else f"u_c = {check.u_combined_pct:.3f} %; "
    lines.append(
        f"  Monte Carlo check (JCGM 101:2008, {check.trials} draws, seed {check.seed}): "
        f"{u_mc}{check.note}"
    )
    return lines


def _flags(evaluation: Evaluation) -> list[str]:
    lines = ["", "Flags"]
    if not evaluation.flags:
        return [*lines, "  none"]
    from chargebook.acquire.protocol import SEVERITY_MARKERS, by_severity

    return lines + [
        f"  {SEVERITY_MARKERS.get(flag.severity, '!')} {flag.message} [{flag.code}]"
        for flag in by_severity(evaluation.flags)
    ]


def render_table(worksheet: Worksheet, evaluation: Evaluation) -> str:
    """Return the readable report of one evaluated worksheet."""
    from chargebook.acquire.protocol import CAUTION

    lines = (
        _header(worksheet, evaluation)
        + _sets(worksheet, evaluation)
        + _factors(evaluation)
        + _results(evaluation)
        + _uncertainty(evaluation)
        + _flags(evaluation)
        + ["", CAUTION]
    )
    return "\n".join(lines) + "\n"


def render_json(worksheet: Worksheet, evaluation: Evaluation) -> str:
    """Return the evaluation as one JSON object, with the worksheet's session description."""
    import json

    from chargebook.acquire.protocol import CAUTION

    document: dict[str, Any] = {
        "worksheet": str(worksheet.path),
        "session": dict(worksheet.session),
    }
    document.update(evaluation.to_dict())
    document["monte_carlo"] = (
        None if evaluation.u_combined_pct is None else evaluation.monte_carlo().to_dict()
    )
    document["caution"] = CAUTION
    return json.dumps(document, indent=2, ensure_ascii=False) + "\n"


def render_html(worksheet: Worksheet, evaluation: Evaluation) -> str:
    """Return the worksheet's self-contained printable HTML report."""
    from chargebook.acquire.reports.export import chargebook_version, generated_at
    from chargebook.acquire.reports.worksheet import worksheet_html

    stamp = f"Generated {generated_at()} by chargebook {chargebook_version()}."
    return worksheet_html(worksheet, evaluation, stamp)


def stdin_document(text: str) -> object:
    """Return the worksheet document read from stdin: JSON when it starts with ``{``, else TOML."""
    import json
    import tomllib

    from chargebook.corrections.errors import InputError

    kind = "JSON" if text.lstrip().startswith("{") else "TOML"
    try:
        return json.loads(text) if kind == "JSON" else tomllib.loads(text)
    except ValueError as error:  # JSONDecodeError and TOMLDecodeError are ValueErrors
        raise InputError(
            "worksheet", "<stdin>", f"valid {kind}", f"is not valid {kind}: {error}"
        ) from None


def run(args: argparse.Namespace) -> int:
    """Evaluate the worksheet and print the report; return 0, or 2 for invalid input."""
    from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT
    from chargebook.acquire.session.worksheet import parse_worksheet, read_worksheet, worksheet_key
    from chargebook.corrections.errors import InputError
    from chargebook.corrections.evaluate import evaluate

    source = "<stdin>" if args.worksheet == "-" else args.worksheet
    try:
        if args.worksheet == "-":
            worksheet = parse_worksheet(stdin_document(sys.stdin.read()), "<stdin>")
        else:
            worksheet = read_worksheet(args.worksheet)
        evaluation = evaluate(worksheet.inputs)
    except InputError as error:
        key = worksheet_key(error.field)
        where = f" (worksheet key {key})" if key and key != error.field else ""
        print(
            f"chargebook correct: invalid input in {source}: {error}{where}",
            file=sys.stderr,
        )
        return EXIT_INVALID_INPUT
    render = render_json if args.json else render_html if args.html else render_table
    from chargebook.acquire.commands.station_reader import write_output

    return write_output(render(worksheet, evaluation), args.output)
