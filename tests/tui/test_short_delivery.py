"""Recording a delivery that stopped short from the measure screen (issue 15 item 4).

The real measure screen under Pilot, fed a fixed engine snapshot (tests/tui/fixtures: a set of
100 MU per reading under review); what it sends to the daemon is recorded by the harness. The
range checked as typed is the daemon's own (corrections/delivered_mu.py: more than 0 and less
than the MU planned).
"""

from __future__ import annotations

from chargebook.tui.screens.measure import MeasureScreen
from chargebook.tui.screens.short_delivery import ShortDeliveryScreen
from chargebook.tui.widgets.fields import Field
from harness import ScreenHarness, load_snapshot

SIZE = (80, 24)


async def _fill(pilot, app, mu: str, reason: str) -> ShortDeliveryScreen:
    await pilot.press("m")
    await pilot.pause()
    dialog = app.screen
    assert isinstance(dialog, ShortDeliveryScreen)
    dialog.query_one("#field-actual_MU", Field).input.value = mu
    dialog.query_one("#field-reason", Field).input.value = reason
    await pilot.pause()
    return dialog


async def test_m_asks_the_MU_delivered_for_the_latest_reading_and_sends_it_with_the_reason():
    app = ScreenHarness(MeasureScreen, load_snapshot("reviewing_spike"))
    async with app.run_test(size=SIZE) as pilot:
        dialog = await _fill(pilot, app, "62", "beam hold: door interlock")
        assert dialog.reading["id"] == 14  # the newest reading used, not a settling one
        dialog.record()
        await pilot.pause()
    assert app.sent == [
        (
            "reading.short_delivery",
            {"reading": 14, "actual_MU": 62.0, "reason": "beam hold: door interlock"},
        )
    ]


async def test_an_MU_not_below_the_planned_is_refused_as_typed_and_nothing_is_sent():
    app = ScreenHarness(MeasureScreen, load_snapshot("reviewing_spike"))
    async with app.run_test(size=SIZE) as pilot:
        dialog = await _fill(pilot, app, "100", "interlock")
        dialog.record()
        await pilot.pause()
        problem = dialog.query_one("#field-actual_MU", Field)
        assert not problem.is_valid()
        assert app.sent == []
        assert isinstance(app.screen, ShortDeliveryScreen)
