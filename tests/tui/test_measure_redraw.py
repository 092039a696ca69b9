"""What the measure screen draws again when a snapshot arrives: whatever changed, whole, and
nothing the daemon did not change (at 50 readings a second, redrawing the rest is most of
the console's work). The snapshots are the fixed ones of ``tests/tui/fixtures``; a snapshot
that follows another is made the way the client applies a delta: the parts the daemon did
not change are the very objects of the one before."""

from __future__ import annotations

from typing import Any

from chargebook.tui.screens.measure import MeasureScreen, relabel
from chargebook.tui.widgets.reading_set import CellsByReading, ReadingSetPanel, reading_cells
from chargebook.tui.widgets.results_panel import ResultsPanel
from harness import CONNECTED, ScreenHarness, load_snapshot
from screen_text import screen_text
from textual.widgets import TabbedContent

SIZE = (80, 24)


def following(snapshot: dict[str, Any], **changed: Any) -> dict[str, Any]:
    """Return the snapshot after ``snapshot`` with ``changed`` (the rest the same objects)."""
    return {**snapshot, **changed, "seq": int(snapshot.get("seq", 0)) + 1}


def count_draws(panel: Any) -> list[int]:
    """Count the panel's draws from now on (the count is the list's one item)."""
    draws = [0]
    draw = panel._draw

    def counted(*args: Any) -> None:
        draws[0] += 1
        draw(*args)

    panel._draw = counted  # counts, changes nothing
    return draws


async def test_new_results_are_drawn_and_a_snapshot_without_them_draws_no_results() -> None:
    first = load_snapshot("reviewing_spike")
    app = ScreenHarness(MeasureScreen, first)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        screen = app.screen
        assert "(provisional)" in screen_text(app)  # a set not yet accepted
        draws = count_draws(screen.query_one(ResultsPanel))
        same_results = following(first, live={"phase": "armed", "seq": 5})
        screen.show(same_results, CONNECTED)
        await pilot.pause()
        assert draws == [0]
        screen.show(following(same_results, results_provisional=False), CONNECTED)
        await pilot.pause()
        assert draws == [1]
        assert "(provisional)" not in screen_text(app)
        failed = following(same_results, results_error="no reading")
        screen.show(failed, CONNECTED)
        await pilot.pause()
        assert "!! Results not computed: no reading" in screen_text(app)


async def test_the_flags_tab_shows_its_new_count_repainted_in_place_or_laid_out_wider() -> None:
    app = ScreenHarness(MeasureScreen, load_snapshot("reviewing_spike"))
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        tab = app.screen.query_one(TabbedContent).get_tab("flags")
        layouts = []
        refresh = tab.refresh

        def counted(*regions: Any, **options: Any) -> None:
            layouts.append(bool(options.get("layout")))
            refresh(*regions, **options)

        tab.refresh = counted  # counts, changes nothing
        relabel(tab, "4 Flags (8 !)")  # as wide as "4 Flags (7 !)"
        await pilot.pause()
        assert "4 Flags (8 !)" in screen_text(app) and tab.label.plain == "4 Flags (8 !)"
        assert not any(layouts)
        relabel(tab, "4 Flags (12 !)")
        await pilot.pause()
        assert "4 Flags (12 !)" in screen_text(app) and any(layouts)


async def test_a_new_reading_is_drawn_and_the_set_unchanged_is_not_drawn_again() -> None:
    first = load_snapshot("collecting")
    app = ScreenHarness(MeasureScreen, first)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        panel = app.screen.query_one(ReadingSetPanel)
        draws = count_draws(panel)
        app.screen.show(following(first, live={"phase": "armed"}), CONNECTED)
        await pilot.pause()
        assert draws == [0]
        taken = first["current_set"]
        new = {**taken["readings"][-1], "id": 999, "seq": 99, "label": "99"}
        new["charge_nC"] = 77.7777
        grown = {**taken, "readings": [*taken["readings"], new]}
        app.screen.show(following(first, current_set=grown), CONNECTED)
        await pilot.pause()
        assert draws == [1]
        assert "  99    77.7777  auto" in screen_text(app)


def test_a_readings_cells_are_worked_out_once_and_again_when_it_changed() -> None:
    reading = load_snapshot("collecting")["current_set"]["readings"][0]
    cells = CellsByReading()
    assert cells(reading) == reading_cells(reading)
    assert cells(reading) is cells(reading)
    changed = {**reading, "charge_nC": 12.5}
    assert cells(changed) == reading_cells(changed) != reading_cells(reading)
