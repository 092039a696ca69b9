"""Screenshots of the console's main screens at 80 × 24, compared with the accepted ones.

Each screen is fed a fixed snapshot made by the real engine (tests/tui/fixtures), so the
pictures never change unless the console does. After a deliberate change, look at the new
pictures and accept them with ``pytest tests/tui/test_screen_snapshots.py --snapshot-update``.
"""

from __future__ import annotations

from collections.abc import Callable

import pytest
from chargebook.tui.messages import LinkStatus
from chargebook.tui.screens.measure import MeasureScreen
from chargebook.tui.screens.setup import SetupScreen
from chargebook.tui.screens.summary import SummaryScreen
from chargebook.tui.widgets.fields import Field
from harness import ScreenHarness, load_snapshot, then_steady
from test_screens import setup_defaults

SIZE = (80, 24)
AWAY = LinkStatus(False, "Not connected to the daemon — retrying…")


def measure(name: str, link: LinkStatus | None = None) -> Callable[[], ScreenHarness]:
    """Return a maker of the measure screen fed the fixed snapshot ``name``."""
    if link is None:
        return lambda: ScreenHarness(MeasureScreen, load_snapshot(name))
    return lambda: ScreenHarness(MeasureScreen, load_snapshot(name), link)


def setup() -> ScreenHarness:
    """Return the setup form, filled with the fixed finished session's details."""
    return ScreenHarness(lambda send: SetupScreen(send, setup_defaults()), load_snapshot("idle"))


def summary() -> ScreenHarness:
    """Return the summary of the fixed finished session."""
    return ScreenHarness(SummaryScreen, load_snapshot("finished"))


def type_into(field_id: str, value: str):
    """Return an action that types ``value`` into the entry ``field_id`` of the top screen."""

    def action(app) -> None:
        app.screen.query_one(f"#field-{field_id}", Field).input.value = value

    return action


#: (picture name, app maker, keys pressed, action then) for each screen worth a picture.
SCREENS = [
    ("setup", setup, (), None),
    ("setup_refusing_k_Q_of_2", setup, (), type_into("k_Q", "2")),
    ("measure_collecting", measure("collecting"), (), None),
    ("measure_reviewing_a_spike", measure("reviewing_spike"), (), None),
    ("measure_flags_tab", measure("reviewing_spike"), ("4",), None),
    ("measure_history_of_sets", measure("instrument_lost"), ("2",), None),
    ("measure_plan", measure("instrument_lost"), ("3",), None),
    ("measure_electrometer_disconnected", measure("instrument_lost"), (), None),
    ("measure_without_the_daemon", measure("collecting", AWAY), (), None),
    ("redo_reason_dialog", measure("reviewing_spike"), ("r",), None),
    ("abort_confirmation_dialog", measure("collecting"), ("x",), None),
    ("air_dialog_refusing_80_C", measure("collecting"), ("t",), type_into("temperature_C", "80")),
    ("summary", summary, (), None),
]


@pytest.mark.parametrize(
    ("make_app", "keys", "action"),
    [screen[1:] for screen in SCREENS],
    ids=[screen[0] for screen in SCREENS],
)
def test_screen_picture(snap_compare, make_app, keys, action):
    steps = then_steady(*keys, action=action)
    assert snap_compare(make_app(), terminal_size=SIZE, run_before=steps)
