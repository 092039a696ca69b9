"""Reading the daemon's snapshot: each piece the console shows comes from the snapshot as sent.

The snapshots are fixed files made by the real sequence engine (tests/tui/fixtures).
"""

from __future__ import annotations

from chargebook.tui import snapshot_view
from harness import load_snapshot


def test_each_state_is_shown_by_its_own_screen():
    assert snapshot_view.screen_for(load_snapshot("idle")) == "setup"
    assert snapshot_view.screen_for(load_snapshot("collecting")) == "measure"
    assert snapshot_view.screen_for(load_snapshot("instrument_lost")) == "measure"
    assert snapshot_view.screen_for(load_snapshot("finished")) == "summary"


def test_the_step_heading_names_step_purpose_bias_and_beam():
    heading = snapshot_view.step_heading(load_snapshot("reviewing_spike"))
    assert heading == "Step 4 of 6 · Opposite polarity · \u2212300\u00a0V · 4 × 100 MU"


def test_factors_use_the_conventions_symbols_and_say_pending_where_not_measured():
    snapshot = load_snapshot("collecting")
    rows = {
        symbol: (value, state)
        for symbol, value, state in snapshot_view.factor_rows(snapshot["results"])
    }
    assert rows["k_pol"] == ("pending", "pending")
    assert rows["k_s"] == ("pending", "pending")
    assert rows["k_elec"][1] == "default"
    N_Dw = f"{snapshot['results']['N_Dw_Gy_per_nC']:.5f}"
    assert rows["N_D,w,Q0"] == (N_Dw, "entered")  # TRS-398's symbol for N_D,w


def test_a_carried_factor_shows_its_source_and_date():
    results = dict(load_snapshot("finished")["results"])
    source = "carried: session 12 of 2026-11-05, full calibration, dated 2026-11-05"
    results["factor_states"] = {**results["factor_states"], "k_pol": "carried"}
    results["factor_sources"] = {**results["factor_sources"], "k_pol": source}
    rows = {symbol: state for symbol, _, state in snapshot_view.factor_rows(results)}
    assert rows["k_pol"] == source
    assert rows["k_s"] == "measured"


def test_results_are_the_daemons_numbers_formatted_not_recomputed():
    snapshot = load_snapshot("finished")
    results = snapshot["results"]
    rows = {
        label: value.replace("\u00a0", " ") for label, value in snapshot_view.result_rows(snapshot)
    }
    assert rows["Dose per MU"] == f"{results['dose_per_MU_cGy']:.4f} cGy/MU"
    assert rows["Corrected M_Q"] == f"{results['M_corrected_nC']:.4f} nC"
    assert rows["Uncertainty u_c"].startswith(f"{results['u_combined_pct']:.2f} %")


def test_the_coverage_factor_shown_is_the_daemons_not_a_fixed_2():
    # Issue 12 item 6: U = k u_c with k from Student's t at ν_eff (JCGM 100:2008 G.4).
    snapshot = load_snapshot("finished")
    snapshot["results"] = {**snapshot["results"], "coverage_factor": 2.45, "U_expanded_pct": 2.8}
    rows = dict(snapshot_view.result_rows(snapshot))
    assert "k=2.45" in rows["Uncertainty u_c"].replace("\u00a0", " ")


def test_the_history_keeps_superseded_sets_with_their_reason():
    rows = snapshot_view.history_rows(load_snapshot("finished")["sets"])
    statuses = [status for _step, _name, status, _mean, _sd in rows]
    assert "superseded: spike on reading 3" in statuses
    assert "superseded: interrupted by the cable" in statuses
    assert statuses.count("accepted") == 6


def test_an_instrument_disconnect_is_said_in_words():
    line = snapshot_view.instrument_text(load_snapshot("instrument_lost"))
    assert line.startswith("!! Electrometer DISCONNECTED")


def test_factor_states_are_shown_as_the_daemon_sent_them_and_never_worked_out():
    snapshot = load_snapshot("collecting")
    results = dict(snapshot["results"])
    states = dict(results["factor_states"])
    del states["k_Q"]  # a state the daemon did not send: the console must not invent one
    results["factor_states"] = states
    shown = {state for _, _, state in snapshot_view.factor_rows(results)}
    assert len(snapshot_view.factor_rows(results)) == len(states)
    assert shown == set(states.values())
    # No results (e.g. readings the results refuse): no factor is shown as "pending".
    assert snapshot_view.factor_rows(None) == []


def test_a_closed_set_with_no_relative_sd_shows_a_dash_as_show_does_not_pending():
    leakage = {
        "step_index": 0,
        "purpose": "leakage",
        "bias_V": 300.0,
        "status": "accepted",
        "reason": None,
        "stats": {"mean_nC": 0.02, "relative_sd_pct": None},
    }
    (row,) = snapshot_view.history_rows([leakage])
    assert row[4] == "—"
    (row,) = snapshot_view.history_rows([{**leakage, "status": "collecting", "stats": {}}])
    assert row[4] == "pending"
