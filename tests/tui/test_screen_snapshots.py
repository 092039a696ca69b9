"""Screenshots of the console's main screens at 80 × 24, compared with the accepted ones.

Each screen is fed a fixed snapshot made by the real engine (tests/tui/fixtures), so the
pictures never change unless the console does. After a deliberate change, look at the new
pictures and accept them with ``pytest tests/tui/test_screen_snapshots.py --snapshot-update``.
"""

from __future__ import annotations

from chargebook.tui.messages import LinkStatus
from chargebook.tui.screens.measure import MeasureScreen
from chargebook.tui.screens.setup import SetupScreen
from chargebook.tui.screens.summary import SummaryScreen
from chargebook.tui.widgets.fields import Field
from harness import ScreenHarness, load_snapshot, then_steady
from test_screens import setup_defaults

SIZE = (80, 24)


def measure(name: str, link: LinkStatus | None = None) -> ScreenHarness:
    """Return the measure screen fed the fixed snapshot ``name``."""
    if link is None:
        return ScreenHarness(MeasureScreen, load_snapshot(name))
    return ScreenHarness(MeasureScreen, load_snapshot(name), link)


def setup() -> ScreenHarness:
    """Return the setup form, filled with the fixed finished session's details."""
    return ScreenHarness(lambda send: SetupScreen(send, setup_defaults()), load_snapshot("idle"))


def type_into(field_id: str, value: str):
    """Return an action that types ``value`` into the entry ``field_id`` of the top screen."""

    def action(app) -> None:
        app.screen.query_one(f"#field-{field_id}", Field).input.value = value

    return action


def test_setup_screen(snap_compare):
    assert snap_compare(setup(), terminal_size=SIZE, run_before=then_steady())


def test_setup_screen_refusing_an_entry(snap_compare):
    steps = then_steady(action=type_into("k_Q", "2"))
    assert snap_compare(setup(), terminal_size=SIZE, run_before=steps)


def test_measure_screen_while_collecting(snap_compare):
    assert snap_compare(measure("collecting"), terminal_size=SIZE, run_before=then_steady())


def test_measure_screen_reviewing_a_set_with_a_spike(snap_compare):
    assert snap_compare(measure("reviewing_spike"), terminal_size=SIZE, run_before=then_steady())


def test_measure_screen_flags_tab(snap_compare):
    steps = then_steady("4")
    assert snap_compare(measure("reviewing_spike"), terminal_size=SIZE, run_before=steps)


def test_measure_screen_history_of_sets(snap_compare):
    steps = then_steady("2")
    assert snap_compare(measure("instrument_lost"), terminal_size=SIZE, run_before=steps)


def test_measure_screen_plan(snap_compare):
    steps = then_steady("3")
    assert snap_compare(measure("instrument_lost"), terminal_size=SIZE, run_before=steps)


def test_measure_screen_with_the_electrometer_disconnected(snap_compare):
    assert snap_compare(measure("instrument_lost"), terminal_size=SIZE, run_before=then_steady())


def test_measure_screen_without_the_daemon(snap_compare):
    away = LinkStatus(False, "Not connected to the daemon — retrying…")
    app = measure("collecting", away)
    assert snap_compare(app, terminal_size=SIZE, run_before=then_steady())


def test_redo_reason_dialog(snap_compare):
    steps = then_steady("r")
    assert snap_compare(measure("reviewing_spike"), terminal_size=SIZE, run_before=steps)


def test_abort_confirmation_dialog(snap_compare):
    steps = then_steady("x")
    assert snap_compare(measure("collecting"), terminal_size=SIZE, run_before=steps)


def test_new_temperature_and_pressure_refusing_80_degrees(snap_compare):
    steps = then_steady("t", action=type_into("temperature_C", "80"))
    assert snap_compare(measure("collecting"), terminal_size=SIZE, run_before=steps)


def test_summary_screen(snap_compare):
    app = ScreenHarness(SummaryScreen, load_snapshot("finished"))
    assert snap_compare(app, terminal_size=SIZE, run_before=then_steady())
