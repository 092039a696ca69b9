"""A calibration visit from the console (issue 15 items 1 and 4), by key presses only.

The real daemon and simulated electrometer run as subprocesses (tests/e2e fixtures); the
console is the real ``ConsoleApp`` under Pilot at 80 × 24. The beams are the invented demo
clinic's (Example Clinic (fictional), DEMO-LA1). Check values are the daemon's own record.
"""

from __future__ import annotations

import pytest
from chargebook.tui.screens.dialogs import ConfirmScreen, ReasonScreen
from chargebook.tui.widgets.fields import Field
from console_driver import daemon_record, press_and_wait, screen_kind, until
from screen_text import screen_text
from test_console_e2e import SIZE, console, simulator_air

pytestmark = pytest.mark.e2e


def _visit(app) -> dict:
    return (app.snapshot or {}).get("visit") or {}


async def _type_into(pilot, app, field: str, text: str) -> None:
    app.screen.query_one(f"#field-{field}", Field).input.value = text
    await pilot.pause()


async def _reason(pilot, app, dialog: type, words: str) -> None:
    await until(pilot, lambda: isinstance(app.screen, dialog), f"the {dialog.__name__}")
    await pilot.press(*words)
    await press_and_wait(pilot, app, "enter")


@pytest.mark.slow
async def test_a_visit_by_keys_measures_beams_carries_the_air_only_when_confirmed_and_closes(
    simulator, daemon, metadata
):
    app = console(daemon, metadata, simulator_air(simulator))
    async with app.run_test(size=SIZE) as pilot:
        await until(pilot, lambda: screen_kind(app) == "setup", "the setup form")
        await press_and_wait(pilot, app, "ctrl+o")
        assert (_visit(app)["machine"], _visit(app)["status"]) == ("DEMO-LA1", "open")
        await until(pilot, lambda: "Visit 1 at DEMO-LA1 (open)" in screen_text(app), "the visit")

        # Beam 1 with 200 MU per reading instead of the plan's 100.
        await _type_into(pilot, app, "mu_per_reading", "200")
        await pilot.press("ctrl+s")
        await until(pilot, lambda: screen_kind(app) == "measure", "the measure screen")
        await until(pilot, lambda: app.snapshot.get("environment"), "the air data recorded")
        await until(pilot, lambda: "Air:" in screen_text(app), "the air entry")
        assert "min ago" in screen_text(app)  # the entry, its source and its age
        beams = _visit(app)["beams"]
        assert [(b["name"], b["status"]) for b in beams] == [("6 MV", "measuring")]
        assert {s["mu_per_reading"] for s in app.snapshot["plan"] if s["purpose"] == "routine"} == {
            200.0
        }
        await pilot.press("x")
        await _reason(pilot, app, ConfirmScreen, "monitor chamber fault")
        await until(pilot, lambda: screen_kind(app) == "summary", "the summary")
        assert "6 MV · quick · unfinished (monitor chamber fault)" in screen_text(app)
        await press_and_wait(pilot, app, "n")

        # Beam 2: the last air data confirmed (Ctrl+L), carried as a confirmation by the daemon.
        await until(pilot, lambda: screen_kind(app) == "setup", "the setup form again")
        await _type_into(pilot, app, "beam", "10 MV")
        await pilot.press("ctrl+l")
        await pilot.press("ctrl+s")
        await until(pilot, lambda: (app.snapshot or {}).get("environment"), "the air confirmed")
        entry = app.snapshot["environment"]
        assert entry["source"].startswith("confirmed: read at")
        assert [b["status"] for b in _visit(app)["beams"]] == ["unfinished", "measuring"]
        await pilot.press("x")
        await _reason(pilot, app, ConfirmScreen, "end of the test")
        await until(pilot, lambda: screen_kind(app) == "summary", "the summary")
        await press_and_wait(pilot, app, "n")

        await until(pilot, lambda: screen_kind(app) == "setup", "the setup form again")
        await pilot.press("ctrl+e")
        await _reason(pilot, app, ReasonScreen, "machine handed back")
        assert _visit(app)["status"] == "closed"
    record = await daemon_record(daemon)
    assert record["visit"]["reason"] == "machine handed back"
