"""Read the daemon's snapshot: the pieces each part of the console shows, as plain values.

The snapshot (``chargebook.acquire.protocol.Snapshot``) is the console's only source of truth:
these functions pick from it and put it into words with :mod:`chargebook.tui.text`. They hold
no state and compute no physics: every number comes from the daemon as it computed it.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from chargebook.acquire.protocol import (
    EngineState,
    SetInfo,
    Snapshot,
    StepInfo,
)
from chargebook.tui import text

#: Correction factors and calibration coefficients shown in the factor table, in this order.
FACTOR_KEYS: tuple[str, ...] = ("k_TP", "k_h", "k_pol", "k_s", "k_elec", "N_Dw", "k_Q")
#: Keys under which a calibration coefficient's value may appear in the results.
FACTOR_VALUE_KEYS: dict[str, tuple[str, ...]] = {
    "N_Dw": ("N_Dw", "N_Dw_Gy_per_nC"),
}
#: Decimals shown per factor (N_D,w is in Gy/nC and needs more).
FACTOR_DIGITS: dict[str, int] = {"N_Dw": 5}

#: States in which a session is open and measuring (the measure screen shows them).
OPEN_STATES = frozenset(
    {
        EngineState.WAITING_FOR_OPERATOR,
        EngineState.SETTLING,
        EngineState.COLLECTING,
        EngineState.REVIEWING,
        EngineState.PAUSED,
        EngineState.INTERRUPTED,
    }
)
#: States in which a session has ended (the summary screen shows them).
CLOSED_STATES = frozenset({EngineState.FINISHED, EngineState.ABORTED})


def screen_for(snapshot: Mapping[str, Any]) -> str:
    """Return which screen shows this snapshot: "setup", "measure" or "summary"."""
    current = snapshot.get("state")
    if current in CLOSED_STATES:
        return "summary"
    if current in OPEN_STATES:
        return "measure"
    return "setup"


def current_step(snapshot: Snapshot) -> StepInfo | None:
    """Return the plan step the sequence is at, or None before the first and after the last."""
    index = snapshot.get("step_index")
    plan = snapshot.get("plan") or []
    if index is None or not 0 <= index < len(plan):
        return None
    return plan[index]


def step_heading(snapshot: Snapshot) -> str:
    """Return the current step in words: "Step 3 of 7 · Opposite polarity · −300 V · 4 × 100 MU"."""
    step = current_step(snapshot)
    plan = snapshot.get("plan") or []
    if step is None:
        return "No step in progress"
    parts = [
        f"Step {step['index'] + 1} of {len(plan)}",
        text.purpose(step["purpose"]),
        text.bias_V(step["bias_V"]),
    ]
    if step.get("mu_per_reading"):
        parts.append(f"{step['readings']} × {step['mu_per_reading']:g} MU")
    else:
        parts.append("beam off")
    if step.get("optional"):
        parts.append("optional")
    return " · ".join(parts)


def steps_done(snapshot: Snapshot) -> tuple[int, int]:
    """Return (steps accepted or skipped, steps in the plan)."""
    plan = snapshot.get("plan") or []
    done = sum(1 for step in plan if step.get("status") in ("accepted", "skipped"))
    return done, len(plan)


#: What replaces every instruction while the console cannot hear from the daemon: the last
#: instruction it showed may no longer be true, and a beam given now may go unrecorded.
NOT_CONNECTED_PROMPT = "NOT CONNECTED: do not deliver beam until the console is connected again."


def prompt_text(snapshot: Snapshot, connected: bool = True) -> str:
    """Return what the operator must do now, in the daemon's plain words.

    While the console is not connected the daemon's last instruction is not shown: the
    operator is told not to deliver beam (:data:`NOT_CONNECTED_PROMPT`).
    """
    if not connected:
        return NOT_CONNECTED_PROMPT
    prompt = snapshot.get("prompt") or {}
    return str(prompt.get("text") or text.state(str(snapshot.get("state", "idle"))))


def live_text(snapshot: Snapshot) -> str:
    """Return the reading in progress in words: "Reading 3: beam on, charge rising · 12.3 nC"."""
    live = snapshot.get("live") or {}
    phase = live.get("phase")
    if not phase or phase == "idle":
        return "Electrometer " + text.phase(phase)
    parts = [text.phase(phase)]
    if live.get("charge_nC") is not None:
        parts.append(text.charge_nC(live["charge_nC"]))
    if live.get("elapsed_s") is not None:
        parts.append(f"{live['elapsed_s']:.1f} s")
    number = live.get("label") or live.get("seq")
    label = f"Reading {number}: " if number is not None else ""
    return label + " · ".join(parts)


def set_charges_nC(set_info: SetInfo | None) -> list[float]:
    """Return the charges of a set's readings in order (settling ones included), in nC."""
    if not set_info:
        return []
    return [reading["charge_nC"] for reading in set_info.get("readings", [])]


def set_count_text(set_info: SetInfo | None) -> str:
    """Return how far the set has got: "3 of 4 readings (+1 settling)"."""
    if not set_info:
        return "No readings yet"
    settling = sum(1 for reading in set_info.get("readings", []) if reading.get("settling"))
    extra = f" (+{settling} settling)" if settling else ""
    return f"{set_info['readings_done']} of {set_info['readings_needed']} readings{extra}"


def set_stats_text(set_info: SetInfo | None) -> str:
    """Return the running mean and relative SD of a set, as the daemon computed them."""
    stats = (set_info or {}).get("stats") or {}
    if not stats:
        return "Mean pending · rel. SD pending"
    rel_sd = stats.get("relative_sd_pct")
    rel_sd_text = "needs 2 readings" if rel_sd is None else text.percent(rel_sd, 3)
    return f"Mean {text.charge_nC(stats.get('mean_nC'))} · rel. SD {rel_sd_text}"


def set_title(set_info: SetInfo) -> str:
    """Return a set's name in words: "Opposite polarity −300 V, try 2"."""
    title = f"{text.purpose(set_info['purpose'])} {text.bias_V(set_info['bias_V'])}"
    return f"{title}, try {set_info['attempt']}" if set_info.get("attempt", 1) > 1 else title


def history_rows(sets: Sequence[SetInfo]) -> list[tuple[str, str, str, str, str]]:
    """Return one row per set, superseded ones included: (step, set, status, mean, rel. SD)."""
    rows = []
    for set_info in sets:
        stats = set_info.get("stats") or {}
        status = text.set_status(set_info["status"])
        if set_info.get("reason"):
            status = f"{status}: {set_info['reason']}"
        rows.append(
            (
                str(set_info["step_index"] + 1),
                set_title(set_info),
                status,
                text.charge_nC(stats.get("mean_nC")),
                _relative_sd_cell(set_info, stats),
            )
        )
    return rows


def _relative_sd_cell(set_info: SetInfo, stats: Mapping[str, Any]) -> str:
    """Return a set's relative SD, "—" when a closed set cannot have one (fewer than two
    readings, as ``show`` writes it), "pending" only while it is still being taken."""
    rel_sd = stats.get("relative_sd_pct")
    if rel_sd is None and set_info.get("status") not in ("collecting", "interrupted"):
        return "—"
    return text.percent(rel_sd, 3)


def factor_value(results: Mapping[str, Any], key: str) -> float | None:
    """Return a factor's value from the results, or None when it is pending."""
    for name in FACTOR_VALUE_KEYS.get(key, (key,)):
        value = results.get(name)
        if isinstance(value, int | float):
            return float(value)
    return None


def factor_rows(results: Mapping[str, Any] | None) -> list[tuple[str, str, str]]:
    """Return (symbol for the convention, value, state) for each factor the daemon sent a state
    for, in the model's order: no results, no rows (the console works out no state itself). A
    carried factor's state says where it came from and its date, as the daemon wrote it."""
    if not results:
        return []
    symbols = results.get("symbols") or {}
    states = results.get("factor_states") or {}
    rows = []
    for key in FACTOR_KEYS:
        if key not in states:
            continue
        value = factor_value(results, key)
        state = str(states[key])
        if state == "carried":
            state = str((results.get("factor_sources") or {}).get(key) or state)
        rows.append(
            (str(symbols.get(key, key)), text.number(value, FACTOR_DIGITS.get(key, 4)), state)
        )
    return rows


def tolerance_pct(snapshot: Snapshot) -> float | None:
    """Return the session's tolerance in %, from the results or the session metadata."""
    results = snapshot.get("results") or {}
    session = snapshot.get("session") or {}
    for source in (results, session.get("metadata") or {}):
        value = source.get("tolerance_pct")
        if isinstance(value, int | float):
            return float(value)
    return None


def deviation_text(snapshot: Snapshot) -> str:
    """Return the deviation from the expected output against the tolerance, in words."""
    results = snapshot.get("results") or {}
    deviation = results.get("deviation_pct")
    tolerance = tolerance_pct(snapshot)
    shown = text.deviation_pct(deviation)
    if deviation is None:
        return shown
    limit = f" (tolerance ±{tolerance:g} %)" if tolerance is not None else ""
    within = results.get("within_tolerance")
    if within is True:
        return f"{shown}{limit}: ok, within tolerance"
    if within is False:
        return f"{shown}{limit}: !! OUTSIDE tolerance"
    return shown + limit


def _coverage_factor(results: dict[str, Any]) -> str:
    """Return k as shown: Student's t at ν_eff; results recorded before ν_eff used k = 2."""
    k = results.get("coverage_factor")
    return "2" if k is None else f"{k:.2f}"


def result_rows(snapshot: Snapshot) -> list[tuple[str, str]]:
    """Return (label, value) rows: :func:`answer_rows`, then :func:`check_rows`."""
    return [*answer_rows(snapshot), *check_rows(snapshot)]


def answer_rows(snapshot: Snapshot) -> list[tuple[str, str]]:
    """Return (label, value) rows: an electron beam's R50 and z_ref (as the daemon worded
    them), raw and corrected charge, dose, per MU, deviation, u_c."""
    results = snapshot.get("results") or {}
    symbols = results.get("symbols") or {}
    combined = results.get("u_combined_pct")
    expanded = results.get("U_expanded_pct")
    uncertainty = (
        text.PENDING
        if combined is None
        else f"{text.percent(combined)} (k={_coverage_factor(results)}: {text.percent(expanded)})"
    )
    quality = results.get("beam_quality_text")
    return [
        *([("Electron beam", str(quality))] if quality else []),
        (f"Raw charge {symbols.get('M_raw', 'M_raw')}", text.charge_nC(results.get("M_raw_nC"))),
        (
            f"Corrected {symbols.get('M_corrected', 'M')}",
            text.charge_nC(results.get("M_corrected_nC")),
        ),
        (f"Dose {symbols.get('dose', 'D_w')}", text.number(results.get("dose_Gy"), 4, "Gy")),
        ("Dose per MU", text.number(results.get("dose_per_MU_cGy"), 4, "cGy/MU")),
        ("Deviation", deviation_text(snapshot)),
        ("Uncertainty u_c", uncertainty),
    ]


def check_rows(snapshot: Snapshot) -> list[tuple[str, str]]:
    """Return (label, value) rows for what the daemon sent beside the results: the leakage as
    a share of the routine reading, Boag's k_s cross-check, and the air each set was corrected
    with (one row when every set shares one entry). Rows whose values were not sent are left out.
    """
    results = snapshot.get("results") or {}
    rows = []
    if results.get("leakage_pct") is not None:
        treated = "subtracted" if results.get("leakage_subtracted") else "not subtracted"
        rows.append(("Leakage", f"{text.percent(results['leakage_pct'], 3)} of M, {treated}"))
    if results.get("k_s_boag") is not None:
        symbol = (results.get("symbols") or {}).get("k_s", "k_s")
        difference = text.deviation_pct(results.get("k_s_boag_difference_pct"))
        rows.append((f"{symbol} by Boag", f"{text.number(results['k_s_boag'], 4)} ({difference})"))
    air = results.get("set_air") or {}
    entries = snapshot.get("environment_entries") or []
    if air and len({str(item.get("entry")) for item in air.values()}) == 1:
        return [*rows, ("Air, all sets", _air_text(next(iter(air.values())), entries))]
    return rows + [(f"Air, {key}", _air_text(item, entries)) for key, item in air.items()]


def _air_text(air: Mapping[str, Any], entries: Sequence[Mapping[str, Any]]) -> str:
    """Return a set's air in words: T, P, and which entry it is, with its source and the local
    time it was recorded."""
    position = air.get("entry")
    stamp = ""
    if isinstance(position, int) and 0 < position <= len(entries):
        entry = entries[position - 1]
        when = text.local_time(entry.get("recorded_at"))[11:]  # the time of day and its offset
        source = f"{entry['source']}, " if entry.get("source") else ""
        stamp = f", {source}{when}"
    where = f"entry {position}{stamp}" if position is not None else str(air.get("source", ""))
    return (
        f"{text.number(air.get('temperature_C'), 2, '°C')}, "
        f"{text.number(air.get('pressure_kPa'), 3, 'kPa')} ({where})"
    )


def session_flags(snapshot: Snapshot, shown_set: SetInfo | None = None) -> list[dict[str, Any]]:
    """Return the flags of the results (k_pol, k_s, leakage, environment, sets...).

    Flags that ``shown_set`` already carries (same code) are left out, so nothing is said twice.
    """
    results = snapshot.get("results") or {}
    already = {item.get("code") for item in (shown_set or {}).get("flags") or []}
    return [item for item in results.get("flags") or [] if item.get("code") not in already]


def instrument_text(snapshot: Snapshot) -> str:
    """Return the electrometer's state in plain words, a disconnect said outright."""
    instrument = snapshot.get("instrument") or {}
    if not instrument.get("connected"):
        message = instrument.get("message") or "retrying"
        return f"!! Electrometer DISCONNECTED: {message}"
    name = instrument.get("identity") or instrument.get("profile") or "electrometer"
    message = instrument.get("message")
    return f"Electrometer connected ({name})" + (f": {message}" if message else "")


def session_text(snapshot: Snapshot) -> str:
    """Return "Session 12 · DEMO-LA1 6 MV · taking readings" (or "No session open")."""
    session = snapshot.get("session")
    state = text.state(str(snapshot.get("state", "idle")))
    if not session:
        return state.capitalize()
    metadata = session.get("metadata") or {}
    where = " ".join(
        str(metadata[key]) for key in ("treatment_machine", "beam") if metadata.get(key)
    ) or str(session.get("beam", ""))
    return " · ".join(part for part in (f"Session {session['id']}", where, state) if part)
