"""The console against the real daemon and the simulated electrometer, by key presses only.

``chargebook simulate`` and ``chargebook serve`` run as subprocesses (tests/e2e fixtures); the
console is the real ``ConsoleApp`` under Textual's Pilot at 80 × 24. Check values are the
daemon's own record (read back over a second connection, or from ``chargebook run
--unattended`` on a simulator with the same seed) and the simulator's bench.
"""

from __future__ import annotations

import getpass
import json
import subprocess

import pytest
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store
from chargebook.tui.app import ConsoleApp
from chargebook.tui.screens.dialogs import ConfirmScreen, ReasonScreen
from chargebook.tui.screens.environment import EnvironmentScreen
from chargebook.tui.widgets.fields import Field
from console_driver import (
    allowed,
    daemon_record,
    press_and_wait,
    run_until,
    screen_kind,
    start_and_reach_step,
    start_session,
    state,
    until,
)
from e2e_support import QUICK_PLAN, TIME_SCALE, chargebook_command
from screen_text import screen_text

pytestmark = pytest.mark.e2e

SIZE = (80, 24)
SEED = 5
ROUTINE_STEP = 1  # the quick plan's second step (tests/e2e/plans/quick.toml)


def bench_air(simulator) -> dict:
    """Return the air temperature and pressure the bench's thermometer and barometer read."""
    with simulator.bench() as bench:
        reply = bench.environment()
    return {
        "temperature_C": reply["temperature_C"],
        "pressure_entered": reply["pressure_kPa"],
        "pressure_unit": "kPa",
    }


def console(daemon, metadata, simulator) -> ConsoleApp:
    """Return the console attached to ``daemon``, its form filled as an operator would."""
    return ConsoleApp(
        daemon.socket,
        operator="console test",
        setup_defaults={**metadata, **bench_air(simulator)},
    )


def unattended_results(start_simulator, tmp_path, metadata) -> dict:
    """Return `chargebook run --unattended --json` on a fresh simulator with the same seed."""
    twin = start_simulator(seed=SEED)
    metadata_file = tmp_path / "metadata.json"
    metadata_file.write_text(json.dumps(metadata))
    command = chargebook_command(
        "run", "--unattended", "--json", "--profile", twin.profile, "--port", twin.serial,
        "--bench-control", twin.control, "--plan", QUICK_PLAN, "--time-scale", str(TIME_SCALE),
        "--db", str(tmp_path / "unattended.sqlite"), "--metadata", str(metadata_file),
    )  # fmt: skip
    done = subprocess.run(command, capture_output=True, check=True, timeout=120)
    return json.loads(done.stdout)


@pytest.mark.slow
async def test_a_whole_session_by_keys_ends_in_the_summary_the_unattended_run_gives(
    start_simulator, start_daemon, metadata, tmp_path
):
    simulator = start_simulator(seed=SEED)
    daemon = start_daemon(simulator)
    app = console(daemon, metadata, simulator)
    async with app.run_test(size=SIZE) as pilot:
        await start_session(pilot, app)
        await run_until(pilot, app, lambda: state(app) == "finished", "the end of the plan")
        await until(pilot, lambda: screen_kind(app) == "summary", "the summary")
        shown = screen_text(app)
        results = dict(app.snapshot["results"])
    expected = unattended_results(start_simulator, tmp_path, metadata)
    # Same seed, same plan, same air: the console's session is the unattended session. A
    # reading may differ in its last printed digit (0.0001 nC, about 5e-6 of a reading) when
    # the end of beam is sampled a poll later, so the match is to 1e-4 relative, well inside
    # the simulator's 0.03 % noise per reading.
    for key in ("M_raw_nC", "k_TP", "k_pol", "k_s", "dose_per_MU_cGy", "U_expanded_pct"):
        assert results[key] == pytest.approx(expected[key], rel=1e-4), key
    assert "Session 1 finished" in shown
    assert f"{results['dose_per_MU_cGy']:.4f} cGy/MU" in shown  # the daemon's number, shown
    assert f"{results['M_corrected_nC']:.4f} nC" in shown


@pytest.mark.slow
async def test_redo_by_keys_keeps_the_spiked_set_superseded_with_the_reason(
    simulator, daemon, metadata
):
    app = console(daemon, metadata, simulator)
    async with app.run_test(size=SIZE) as pilot:
        await start_and_reach_step(pilot, app, ROUTINE_STEP)
        with simulator.bench() as bench:
            bench.spike()  # the next reading carries a spike
        await run_until(pilot, app, lambda: state(app) == "reviewing", "the routine set's review")
        assert "4 Flags" in screen_text(app)
        await pilot.press("r")
        await until(pilot, lambda: isinstance(app.screen, ReasonScreen), "the reason question")
        await pilot.press(*"spike on a reading")
        await press_and_wait(pilot, app, "enter")
        await until(pilot, lambda: state(app) == "waiting_for_operator", "the step again")
        sets = app.snapshot["sets"]
        await pilot.press("2")
        await pilot.pause()
        history = screen_text(app)
    assert [(s["step_key"], s["status"], s["reason"]) for s in sets][-1] == (
        "routine",
        "superseded",
        "spike on a reading",
    )
    assert "superseded: spike on a reading" in history
    record = await daemon_record(daemon)
    superseded = [s for s in record["sets"] if s["status"] == "superseded"]
    assert [s["reason"] for s in superseded] == ["spike on a reading"]
    assert len(superseded[0]["readings"]) >= 1  # the old set's readings are kept


@pytest.mark.slow
async def test_abort_by_keys_asks_to_confirm_then_keeps_everything_marked_aborted(
    simulator, daemon, metadata
):
    app = console(daemon, metadata, simulator)
    async with app.run_test(size=SIZE) as pilot:
        await start_and_reach_step(pilot, app, ROUTINE_STEP)
        readings_before = sum(len(s["readings"]) for s in app.snapshot["sets"])
        await pilot.press("x")
        await until(pilot, lambda: isinstance(app.screen, ConfirmScreen), "the confirmation")
        await pilot.press(*"chamber cable damaged")
        await press_and_wait(pilot, app, "enter")
        await until(pilot, lambda: screen_kind(app) == "summary", "the summary")
        shown = screen_text(app)
    assert "!! Session 1 ABORTED: chamber cable damaged" in shown
    record = await daemon_record(daemon)
    assert record["session"]["status"] == "aborted"
    assert sum(len(s["readings"]) for s in record["sets"]) == readings_before


async def test_80_degrees_is_refused_naming_the_field_and_nothing_recorded_is_lost(
    simulator, daemon, metadata
):
    app = console(daemon, metadata, simulator)
    async with app.run_test(size=SIZE) as pilot:
        await start_and_reach_step(pilot, app, ROUTINE_STEP)
        before = app.snapshot
        await pilot.press("t")
        await until(pilot, lambda: isinstance(app.screen, EnvironmentScreen), "the air form")
        temperature = app.screen.query_one("#field-temperature_C", Field)
        temperature.input.value = ""
        await pilot.press("8", "0", "enter")
        await pilot.pause()
        assert isinstance(app.screen, EnvironmentScreen)  # refused: the form stays open
        # Plausible range 10-40 °C: common practice (docs/physics.md, 6.1 "Refused inputs").
        refusal = "Air temperature °C: 80 is outside 10 to 40 °C"
        assert temperature.problem == refusal
        assert "!! Air temperature °C: 80 is outside" in screen_text(app)
        await pilot.press("escape")
        await until(pilot, lambda: not isinstance(app.screen, EnvironmentScreen), "the form shut")
    record = await daemon_record(daemon)
    assert record["environment"] == before["environment"]  # no new entry
    assert [s["readings"] for s in record["sets"]] == [s["readings"] for s in before["sets"]]
    assert record["session"]["status"] == "open"


async def test_the_console_reconnects_when_the_daemon_restarts_and_says_so_meanwhile(
    simulator, daemon, metadata
):
    app = console(daemon, metadata, simulator)
    async with app.run_test(size=SIZE) as pilot:
        await start_session(pilot, app)
        session_id = app.snapshot["session"]["id"]
        daemon.kill9()
        await until(pilot, lambda: not app.link.connected, "the lost daemon")
        assert screen_text(app).startswith(" !! Not connected to the daemon — retrying…")
        daemon.restart()
        await until(pilot, lambda: app.link.connected, "the daemon back")
        await until(pilot, lambda: screen_kind(app) == "measure", "the measure screen")
        assert app.snapshot["session"]["id"] == session_id  # the same session, resumed
        assert screen_text(app).startswith(f" Session {session_id} · DEMO-LA1 6 MV")


@pytest.mark.slow
async def test_an_instrument_disconnect_mid_set_is_shown_plainly_and_the_set_continues(
    simulator, start_daemon, metadata
):
    # No bench: no beam is delivered, so the set cannot end by itself. The operator takes each
    # reading by hand (capture), so the cable is pulled at a moment fixed by what the console
    # shows, never by timing (with the bench the set could end before the pull on a loaded
    # machine, and did).
    daemon = start_daemon(simulator, bench=False)
    app = console(daemon, metadata, simulator)
    async with app.run_test(size=SIZE) as pilot:
        await start_and_reach_step(pilot, app, ROUTINE_STEP)
        await press_and_wait(pilot, app, "a")
        await capture_by_hand(pilot, app)
        assert state(app) == "collecting" and readings_done(app) == 1
        with simulator.bench() as bench:
            bench.drop(1.0)  # the cable is pulled for a second
        await until(pilot, lambda: not instrument_connected(app), "the lost electrometer")
        assert screen_text(app).startswith(" !! Electrometer DISCONNECTED")
        await until(pilot, lambda: state(app) == "interrupted", "the interrupted set")
        kept = readings_done(app)
        assert kept == 1
        await until(pilot, lambda: instrument_connected(app), "the electrometer back")
        shown = screen_text(app)
        assert "electrometer connected" in shown.splitlines()[0]
        assert "interrupted" in shown
        await press_and_wait(pilot, app, "a")  # continue the interrupted set
        while state(app) != "reviewing":
            await capture_by_hand(pilot, app)
        assert readings_done(app) == 3  # the reading taken before the drop is kept


async def capture_by_hand(pilot, app: ConsoleApp) -> None:
    """Wait until a reading is in progress (a sample arrived), then capture it with "c"."""
    before = readings_done(app)
    await until(pilot, lambda: "reading.capture" in allowed(app), "a reading to capture")
    await press_and_wait(pilot, app, "c")
    await until(pilot, lambda: readings_done(app) > before, "the captured reading")


def readings_done(app: ConsoleApp) -> int:
    """Return the used readings of the set on screen in the console's latest snapshot."""
    current = app.snapshot.get("current_set") or {}
    return int(current.get("readings_done", 0))


def instrument_connected(app: ConsoleApp) -> bool:
    """Return whether the console's latest snapshot says the electrometer is connected."""
    return bool(app.snapshot["instrument"]["connected"])


@pytest.mark.slow
async def test_a_bias_change_the_electrometer_cannot_make_is_asked_for_and_done_by_hand(
    start_simulator, start_daemon, metadata
):
    simulator = start_simulator(profile="push-exponent")  # no remote bias supply
    daemon = start_daemon(simulator)
    app = console(daemon, metadata, simulator)
    async with app.run_test(size=SIZE) as pilot:
        await start_session(pilot, app)
        await run_until(
            pilot, app, lambda: "step.manual_done" in allowed(app), "a step done by hand"
        )
        await run_until(pilot, app, lambda: "Do now:" in screen_text(app), "the instruction drawn")
        shown = " ".join(screen_text(app).split())
        asked = app.snapshot["prompt"]["text"]  # the daemon's words, e.g. "Turn the bias to ..."
        assert "step.arm" not in allowed(app)  # no readings before the switch is turned
        await press_and_wait(pilot, app, "d")
        await run_until(pilot, app, lambda: state(app) == "finished", "the end of the plan")
    assert "by hand" in asked
    assert f"Do now: {asked}" in shown  # said in plain words on the measure screen
    record = await daemon_record(daemon)
    assert record["session"]["status"] == "finished"


async def test_the_watch_console_shows_the_session_and_offers_no_action(
    daemon, metadata, simulator
):
    from chargebook.acquire.commands.operator_auto import AutoOperator, environment_from_bench
    from chargebook.tui.actions import ACTIONS

    control = await daemon.connect()
    operator = AutoOperator(control, environment_from_bench(simulator.control))
    snapshot = await operator.start(metadata)
    snapshot = await operator.run_until(snapshot, lambda s: "step.arm" in s["allowed"])
    app = ConsoleApp(daemon.socket.parent / "watch.sock", watch=True)
    async with app.run_test(size=SIZE) as pilot:
        await until(pilot, lambda: screen_kind(app) == "measure", "the measure screen")
        screen = app.main_screen
        assert "step.arm" in allowed(app)  # the daemon would allow it on the control socket
        assert screen.allowed() == []  # but the watching console offers nothing
        for action in ACTIONS:
            assert screen.check_action("do", (action.name,)) is False
        await until(pilot, lambda: "watching: no actions" in screen_text(app), "watching")
        assert "Capture" not in screen_text(app)  # no action bar
        seq = app.snapshot["seq"]
        await pilot.press("a")  # the arm key of an operator's console
        await pilot.pause(0.2)
    after = await control.status()
    await control.close()
    assert after["state"] == snapshot["state"] and "step.arm" in after["allowed"]
    assert after["seq"] == seq  # nothing happened


async def test_the_operator_typed_into_the_form_is_the_actor_of_the_consoles_requests(
    simulator, daemon, metadata
):
    # The console was started as "console test"; the form says who measures (issue 15).
    app = console(daemon, metadata, simulator)
    async with app.run_test(size=SIZE) as pilot:
        await start_session(pilot, app)
        session_id = app.snapshot["session"]["id"]
    with Store.open(daemon.db, read_only=True) as store:
        events = store.events(session_id)
    by_console_kinds = (EventKind.SESSION_CREATED, EventKind.ENVIRONMENT_ENTERED)
    by_console = [e for e in events if e.kind in by_console_kinds]
    assert {e.actor for e in by_console} == {metadata["operator"]}
    assert {e.account for e in by_console} == {getpass.getuser()}
