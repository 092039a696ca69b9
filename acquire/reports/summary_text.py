"""Plain-text views of a session for the terminal: progress lines and the result table.

Formatting only: every number comes from a result document (``session_result``), which
``corrections`` computed.
"""

from __future__ import annotations

from typing import Any

from chargebook.acquire.protocol import CAUTION, SEVERITY_MARKERS, by_severity

FACTORS = ("k_TP", "k_h", "k_pol", "k_s", "k_elec")


# ------------------------------------- words shared by the session's outputs (text, HTML)
SET_NAMES = {"routine": "routine", "opposite": "opposite polarity", "reduced": "reduced bias"}


def leakage_text(results: dict[str, Any]) -> str:
    """Return the leakage as a share of the routine reading and whether it was subtracted."""
    share = results.get("leakage_pct")
    if share is None:
        return "not measured" if results.get("leakage_nC") is None else "pending"
    treated = "subtracted, as chosen" if results.get("leakage_subtracted") else "not subtracted"
    return f"{share:+.3f} % of the routine reading ({results['leakage_nC']:+.5f} nC), {treated}"


def boag_text(results: dict[str, Any]) -> str | None:
    """Return Boag's k_s beside the protocol's, with the difference; None when not computed."""
    boag = results.get("k_s_boag")
    if boag is None:
        return None
    symbol = (results.get("symbols") or {}).get("k_s", "k_s")
    return (
        f"{boag:.5f} by Boag's pulsed-beam theory; {symbol} differs by "
        f"{results['k_s_boag_difference_pct']:+.3f} %"
    )


def set_air_rows(
    results: dict[str, Any], entry_times: dict[int, str] | None = None
) -> list[tuple[str, str]]:
    """Return (set, the air it was corrected with) per set taken: T, P, k_TP, which entry.

    ``entry_times``: entry position -> when it was recorded, as shown, to say when it was entered.
    """
    rows = []
    k_TP = (results.get("symbols") or {}).get("k_TP", "k_TP")  # P_TP under TG-51
    for key, air in (results.get("set_air") or {}).items():
        stamp = (entry_times or {}).get(air.get("entry"))
        recorded = f", recorded {stamp}" if stamp else ""
        rows.append(
            (
                SET_NAMES.get(key, key),
                f"{air['temperature_C']:.2f} °C, {air['pressure_kPa']:.3f} kPa, "
                f"{k_TP} {air['k_TP']:.5f} ({air['source']}{recorded})",
            )
        )
    return rows


def reading_line(reading_set: dict[str, Any], reading: dict[str, Any]) -> str:
    """Return one progress line for a reading just recorded."""
    note = " (settling, not used)" if reading["settling"] else ""
    bias = f"{reading_set['bias_V']:+g} V"
    return (
        f"{reading_set['step_key']:<13} {bias:>8}  #{reading['seq']:<2} "
        f"{reading['charge_nC']:>+11.4f} nC  {reading['capture']}{note}"
    )


def _number(value: Any, digits: int = 5) -> str:
    return "pending" if value is None else f"{value:.{digits}f}"


def cross_check_rows(results: dict[str, Any]) -> list[tuple[str, str]]:
    """Return (label, text) rows: leakage, Boag's k_s cross-check, the air of each set."""
    rows = [("leakage", leakage_text(results))]
    boag = boag_text(results)
    if boag is not None:
        symbol = (results.get("symbols") or {}).get("k_s", "k_s")  # P_ion under TG-51
        rows.append((f"{symbol} cross-check", boag))
    rows += [(f"air, {name}", text) for name, text in set_air_rows(results)]
    return rows


def result_table(document: dict[str, Any], truth: dict[str, Any] | None = None) -> str:
    """Return the factors, charge, dose, uncertainty and flags as a table (truth beside them)."""
    symbols = document.get("symbols", {})
    states = document.get("factor_states", {})
    header = f"{'factor':<10}{'value':>12}  {'state':<9}"
    if truth is not None:
        header += f"{'simulator truth':>17}"
    lines = [f"Session {document['session_id']}", header]
    if document.get("results_error"):
        lines.insert(1, f"!! Results not computed: {document['results_error']}")
    for key in FACTORS:
        row = (
            f"{symbols.get(key, key):<10}{_number(document.get(key)):>12}  {states.get(key, ''):<9}"
        )
        if truth is not None and key in truth:
            row += f"{truth[key]:>17.5f}"
        lines.append(row)
    sources = document.get("factor_sources", {})
    lines += [
        f"{symbols.get(key, key)} {sources.get(key, 'carried')}"
        for key in FACTORS
        if states.get(key) == "carried"
    ]
    unit = "%"
    lines += [
        "",
        f"M_raw           {_number(document.get('M_raw_nC'), 4)} nC",
        f"M corrected     {_number(document.get('M_corrected_nC'), 4)} nC",
        f"dose to water   {_number(document.get('dose_Gy'), 4)} Gy",
        f"dose per MU     {_number(document.get('dose_per_MU_cGy'), 4)} cGy/MU",
        f"deviation       {_number(document.get('deviation_pct'), 2)} {unit} "
        f"(tolerance {document.get('tolerance_pct')} {unit})",
        f"u_c             {_number(document.get('u_combined_pct'), 2)} {unit}, "
        f"U (k = {_number(document.get('coverage_factor'), 3)}) "
        f"{_number(document.get('U_expanded_pct'), 2)} {unit}",
    ]
    lines += [f"{label:<22} {text}" for label, text in cross_check_rows(document)]
    flags = document.get("flags", [])
    if flags:
        lines += ["", "Flags:"] + [
            f"  {SEVERITY_MARKERS.get(flag.get('severity'), '!')} {flag['message']}"
            for flag in by_severity(flags)
        ]
    lines += ["", CAUTION]
    return "\n".join(lines) + "\n"
