"""The console against the real daemon and the simulated electrometer, by key presses only.

The daemon is the real one in this process (``tests/acquire/in_process_daemon.py``: its engine,
instrument thread, SQLite file and Unix socket), its electrometer the simulator on the in-memory
wire with a hand clock, so the cable is pulled at a moment the test chooses. The console is the
real ``ConsoleApp`` under Textual's Pilot at 80 × 24, talking to the daemon over its socket.
A restart of the daemon process is shown against ``chargebook serve`` itself (tests/e2e
fixtures), and the console in a real terminal in ``test_console_tmux.py``. Check values are the
daemon's own record (read back over a second connection, or from the automatic operator on a
twin daemon with the same seed) and the simulator's bench.
"""

from __future__ import annotations

import getpass
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import pytest
from chargebook.acquire.daemon.daemon import POLL_INTERVAL_S
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
from e2e_support import QUICK_PLAN, TIME_SCALE
from screen_text import screen_text

from tests.acquire.in_process_daemon import InProcessDaemon, session_daemon

pytestmark = pytest.mark.e2e

SIZE = (80, 24)
SEED = 5
ROUTINE_STEP = 1  # the quick plan's second step (tests/e2e/plans/quick.toml)
#: Real seconds per poll interval of instrument time: the console sees live charges at the pace
#: a person would (faster, it spends its time drawing snapshots nobody could read).
REAL_PACE_S = POLL_INTERVAL_S


def bench_air(daemon) -> dict:
    """Return the air temperature and pressure the bench's thermometer and barometer read."""
    reply = daemon.sim.device.environment()
    return {
        "temperature_C": reply["temperature_C"],
        "pressure_entered": reply["pressure_kPa"],
        "pressure_unit": "kPa",
    }


def simulator_air(simulator) -> dict:
    """Return the air the simulator process's thermometer and barometer read (for a console on
    a daemon started as a process)."""
    with simulator.bench() as bench:
        reply = bench.environment()
    return {
        "temperature_C": reply["temperature_C"],
        "pressure_entered": reply["pressure_kPa"],
        "pressure_unit": "kPa",
    }


def console(daemon, metadata, air: dict | None = None) -> ConsoleApp:
    """Return the console attached to ``daemon``, its form filled as an operator would (the
    air as ``air`` says, else as the in-process daemon's bench reads it)."""
    return ConsoleApp(
        daemon.socket,
        operator="console test",
        setup_defaults={**metadata, **(air or bench_air(daemon))},
    )


@pytest.fixture
async def daemon(tmp_path: Path) -> AsyncIterator[InProcessDaemon]:
    """The daemon in this process on the quick plan, with the bench, time running."""
    async with session_daemon(tmp_path, seed=SEED, real_s_per_step=REAL_PACE_S) as daemon:
        yield daemon


async def unattended_results(tmp_path: Path, metadata: dict[str, Any]) -> dict:
    """Return the results of the automatic operator's session on a twin daemon, same seed."""
    async with session_daemon(tmp_path / "twin", seed=SEED) as twin:
        client, operator = await twin.operator()
        final = await operator.run(metadata)
        await client.close()
    return final["results"]


@pytest.mark.slow
async def test_a_whole_session_by_keys_ends_in_the_summary_the_unattended_run_gives(
    daemon, metadata, tmp_path
):
    app = console(daemon, metadata)
    async with app.run_test(size=SIZE) as pilot:
        await start_session(pilot, app)
        await run_until(pilot, app, lambda: state(app) == "finished", "the end of the plan")
        await until(pilot, lambda: screen_kind(app) == "summary", "the summary")
        shown = screen_text(app)
        results = dict(app.snapshot["results"])
    expected = await unattended_results(tmp_path, metadata)
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
async def test_redo_by_keys_keeps_the_spiked_set_superseded_with_the_reason(daemon, metadata):
    app = console(daemon, metadata)
    async with app.run_test(size=SIZE) as pilot:
        await start_and_reach_step(pilot, app, ROUTINE_STEP)
        daemon.sim.device.set_spike()  # the next reading carries a spike
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
async def test_abort_by_keys_asks_to_confirm_then_keeps_everything_marked_aborted(daemon, metadata):
    app = console(daemon, metadata)
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
    daemon, metadata
):
    app = console(daemon, metadata)
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
    simulator, start_daemon, metadata
):
    daemon = start_daemon(simulator)  # the real `chargebook serve`: it is killed and restarted
    app = console(daemon, metadata, simulator_air(simulator))
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
        # The restarted daemon may still be reaching the electrometer (a banner says so first).
        await until(
            pilot,
            lambda: screen_text(app).startswith(f" Session {session_id} · DEMO-LA1 6 MV"),
            "the session's line once the electrometer is back",
        )


@pytest.mark.slow  # a reconnection at the daemon's backoff
async def test_an_instrument_disconnect_mid_set_is_shown_plainly_and_the_set_continues(
    tmp_path, metadata
):
    # No bench: no beam is delivered, so the set cannot end by itself; the operator takes each
    # reading by hand (capture). The cable is pulled with the hand clock stopped after the first
    # reading, so the set is unfinished at the pull by construction (with a timer and the bench
    # the set could end before the pull on a loaded machine, and did).
    async with session_daemon(
        tmp_path, seed=SEED, bench=False, real_s_per_step=REAL_PACE_S
    ) as daemon:
        app = console(daemon, metadata)
        async with app.run_test(size=SIZE) as pilot:
            await start_and_reach_step(pilot, app, ROUTINE_STEP)
            await press_and_wait(pilot, app, "a")
            await capture_by_hand(pilot, app)
            assert state(app) == "collecting" and readings_done(app) == 1
            await daemon.stop_time()
            daemon.sim.wire.unplug()  # the cable is pulled
            daemon.time.advance(0.05)  # one poll interval: the daemon finds no instrument
            await until(pilot, lambda: not instrument_connected(app), "the lost electrometer")
            assert screen_text(app).startswith(" !! Electrometer DISCONNECTED")
            await until(pilot, lambda: state(app) == "interrupted", "the interrupted set")
            kept = readings_done(app)
            assert kept == 1
            daemon.sim.wire.plug()  # and put back
            await until(pilot, lambda: instrument_connected(app), "the electrometer back")
            shown = screen_text(app)
            assert "electrometer connected" in shown.splitlines()[0]
            assert "interrupted" in shown
            daemon.let_time_run(REAL_PACE_S)
            await press_and_wait(pilot, app, "a")  # continue the interrupted set
            while state(app) != "reviewing":
                await capture_by_hand(pilot, app)
            assert readings_done(app) == 3  # the reading taken before the pull is kept


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
    tmp_path, metadata
):
    # push-exponent has no remote bias supply
    async with (
        session_daemon(tmp_path, profile="push-exponent", real_s_per_step=REAL_PACE_S) as daemon,
        console(daemon, metadata).run_test(size=SIZE) as pilot,
    ):
        app = pilot.app
        await start_session(pilot, app)
        await run_until(
            pilot, app, lambda: "step.manual_done" in allowed(app), "a step done by hand"
        )
        # Wait without moving: a move here would press "d" before the instruction is drawn.
        await until(pilot, lambda: "Do now:" in screen_text(app), "the instruction drawn")
        shown = " ".join(screen_text(app).split())
        asked = app.snapshot["prompt"]["text"]  # the daemon's words, e.g. "Turn the bias to ..."
        assert "step.arm" not in allowed(app)  # no readings before the switch is turned
        await press_and_wait(pilot, app, "d")
        await run_until(pilot, app, lambda: state(app) == "finished", "the end of the plan")
        record = await daemon_record(daemon)
    assert "by hand" in asked
    assert f"Do now: {asked}" in shown  # said in plain words on the measure screen
    assert record["session"]["status"] == "finished"


async def test_the_watch_console_shows_the_session_and_offers_no_action(daemon, metadata):
    from chargebook.tui.actions import ACTIONS

    control, operator = await daemon.operator()
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
    daemon, metadata
):
    # The console was started as "console test"; the form says who measures (issue 15).
    app = console(daemon, metadata)
    async with app.run_test(size=SIZE) as pilot:
        await start_session(pilot, app)
        session_id = app.snapshot["session"]["id"]
    with Store.open(daemon.db, read_only=True) as store:
        events = store.events(session_id)
    by_console_kinds = (EventKind.SESSION_CREATED, EventKind.ENVIRONMENT_ENTERED)
    by_console = [e for e in events if e.kind in by_console_kinds]
    assert {e.actor for e in by_console} == {metadata["operator"]}
    assert {e.account for e in by_console} == {getpass.getuser()}


async def test_the_form_is_filled_from_the_registers_and_the_session_names_the_rows(
    start_daemon, simulator, tmp_path
):
    """Ctrl+R lists the registers from the daemon; the chosen beam, chamber and electrometer
    fill the form, the certificate's date is shown, and the session keeps the row ids."""
    from chargebook.acquire.commands.demo_data import add_demo_registers
    from chargebook.tui.screens.register_pick import RegisterPickScreen
    from textual.widgets import Select

    db = tmp_path / "station.sqlite"
    with Store.open(db) as store:
        ids = add_demo_registers(store, actor="physicist C")
    daemon = start_daemon(simulator, db)
    app = ConsoleApp(
        daemon.socket,
        operator="console test",
        setup_defaults={"operator": "operator A", **simulator_air(simulator)},
    )
    async with app.run_test(size=(100, 40)) as pilot:
        await until(pilot, lambda: screen_kind(app) == "setup", "the setup form")
        await pilot.press("ctrl+r")
        await until(
            pilot,
            lambda: isinstance(app.screen, RegisterPickScreen) and app.screen.is_mounted,
            "the registers, put up whole",
        )
        choices = {
            kind: [label for label, _ in app.screen.query_one(f"#pick-{kind}", Select)._options]
            for kind in ("beam", "chamber")
        }
        for kind, key in (("beam", "la1_6mv"), ("chamber", "ch1"), ("electrometer", "em1")):
            app.screen.query_one(f"#pick-{kind}", Select).value = ids[key]
        await pilot.click("#confirm")
        await until(
            pilot,
            lambda: not isinstance(app.screen, RegisterPickScreen) and screen_kind(app) == "setup",
            "the form again",
        )
        await until(
            pilot,
            lambda: app.screen.query_one("#input-chamber_serial").value == "SIM-CH-0001",
            "the chamber's serial in the form",
        )
        shown = " ".join(screen_text(app).split())
        await start_session(pilot, app)
        kept = app.snapshot["session"]["metadata"]
    assert "DEMO-LA1 6 MV" in choices["beam"] and "DEMO-LA1 10 MeV" in choices["beam"]
    assert "SIM-CH-0003" in choices["chamber"]
    assert "From the registers: DEMO-LA1 6 MV, chamber SIM-CH-0001" in shown
    assert "certificate SIM-CAL-0001, Example Calibration Laboratory (fictional) of 20" in shown
    assert kept["registers"]["beam"] == ids["la1_6mv"]
    assert kept["register_copy"]["chamber"]["fields"]["serial"] == "SIM-CH-0001"
    assert kept["k_Q"] == 0.992


async def test_ctrl_t_has_the_daemon_read_its_sensor_and_without_one_says_so(
    start_daemon, simulator, metadata
):
    """In the air form, Ctrl+T records an entry the daemon reads from its environment sensor
    (serve --sensor-port); a daemon with no sensor refuses it in words, and the form stays."""
    plain = start_daemon(simulator)
    app = console(plain, metadata, simulator_air(simulator))
    async with app.run_test(size=SIZE) as pilot:
        await start_session(pilot, app)
        await pilot.press("t")
        await until(pilot, lambda: isinstance(app.screen, EnvironmentScreen), "the air form")
        await pilot.press("ctrl+t")
        await until(pilot, lambda: "Not read: sensor" in screen_text(app), "the refusal")
        assert isinstance(app.screen, EnvironmentScreen)
    plain.stop()
    sensed = start_daemon(
        simulator, None, QUICK_PLAN, True, TIME_SCALE, "--sensor-port", simulator.info["sensor"]
    )
    app = console(sensed, metadata, simulator_air(simulator))
    async with app.run_test(size=SIZE) as pilot:
        await start_session(pilot, app)
        typed = app.snapshot["environment"]["source"]
        await pilot.press("t")
        await until(pilot, lambda: isinstance(app.screen, EnvironmentScreen), "the air form")
        await pilot.press("ctrl+t")
        await until(pilot, lambda: not isinstance(app.screen, EnvironmentScreen), "the form shut")
        await until(
            pilot,
            lambda: app.snapshot["environment"]["source"].startswith("sensor SIM-TP-0001"),
            "the sensor's entry",
        )
    assert typed == "typed at the console"  # the form's typed entry, marked as typed
