"""Plain-text views of a session for the terminal: progress lines and the result table.

Formatting only: every number comes from a result document (``session_result``), which
``corrections`` computed.
"""

from __future__ import annotations

from typing import Any

from chargebook.acquire.cli import CAUTION

FACTORS = ("k_TP", "k_h", "k_pol", "k_s", "k_elec")


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


def result_table(document: dict[str, Any], truth: dict[str, Any] | None = None) -> str:
    """Return the factors, charge, dose, uncertainty and flags as a table (truth beside them)."""
    symbols = document.get("symbols", {})
    states = document.get("factor_states", {})
    header = f"{'factor':<10}{'value':>12}  {'state':<9}"
    if truth is not None:
        header += f"{'simulator truth':>17}"
    lines = [f"Session {document['session_id']}", header]
    for key in FACTORS:
        row = (
            f"{symbols.get(key, key):<10}{_number(document.get(key)):>12}  {states.get(key, ''):<9}"
        )
        if truth is not None and key in truth:
            row += f"{truth[key]:>17.5f}"
        lines.append(row)
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
    flags = document.get("flags", [])
    if flags:
        lines += ["", "Flags:"] + [f"  ! {flag['message']}" for flag in flags]
    lines += ["", CAUTION]
    return "\n".join(lines) + "\n"
