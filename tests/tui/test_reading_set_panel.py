"""The reading set's panel given a set before its own parts exist (seen on a loaded machine:
the first snapshot reached the measure screen before the panel had composed, and the console
stopped on a query for a part not yet there)."""

from __future__ import annotations

from chargebook.tui import snapshot_view
from chargebook.tui.widgets.reading_set import ReadingSetPanel
from harness import load_snapshot
from screen_text import screen_text
from textual.app import App, ComposeResult


class GivenEarly(App[None]):
    """Shows a panel that was given its set before it was mounted, so before it composed."""

    def __init__(self, panel: ReadingSetPanel) -> None:
        super().__init__()
        self.panel = panel

    def compose(self) -> ComposeResult:
        yield self.panel


async def test_a_set_given_before_the_panel_composed_is_drawn_once_it_is() -> None:
    given = load_snapshot("collecting")["current_set"]
    panel = ReadingSetPanel()
    panel.set_info = given  # nothing of the panel exists yet
    app = GivenEarly(panel)
    async with app.run_test(size=(80, 24)) as pilot:
        await pilot.pause()
        shown = screen_text(app)
    assert "No reading set yet" not in shown
    # (the screen's text reads no-break spaces as spaces)
    assert snapshot_view.set_title(given).replace("\xa0", " ") in shown
    assert snapshot_view.set_count_text(given).replace("\xa0", " ") in shown


def test_the_readings_in_sight_are_the_same_lines_as_among_all_with_columns_for_all() -> None:
    from chargebook.tui.widgets.reading_set import reading_rows

    given = load_snapshot("reviewing_spike")["current_set"]
    heading, every = reading_rows(given)
    assert len(every) == len(given["readings"])
    assert reading_rows(given, shown=slice(2, 5)) == (heading, every[2:5])
    wide = {**given["readings"][0], "charge_nC": -123456.7891, "capture": "by hand"}
    widened = {**given, "readings": [*given["readings"], wide]}
    wide_heading, wide_rows = reading_rows(widened, shown=slice(0, 2))
    # a reading out of sight still sets the columns' widths: they never move as one scrolls
    assert len(wide_heading) > len(heading) and len(wide_rows[0]) > len(every[0])
    assert wide_rows == reading_rows(widened)[1][:2]
