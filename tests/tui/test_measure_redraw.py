"""What the measure screen draws again when a snapshot arrives: whatever changed, whole, and
nothing the daemon did not change (at 50 readings a second, redrawing the rest is most of
the console's work). The snapshots are the fixed ones of ``tests/tui/fixtures``; a snapshot
that follows another is made the way the client applies a delta: the parts the daemon did
not change are the very objects of the one before."""

from __future__ import annotations

from typing import Any

from chargebook.tui.screens.measure import MeasureScreen
from chargebook.tui.widgets.action_bar import ActionBar
from chargebook.tui.widgets.key_line import KeyLine
from chargebook.tui.widgets.reading_set import (
    CellsByReading,
    ReadingSetPanel,
    column_widths,
    reading_cells,
)
from chargebook.tui.widgets.results_panel import ResultsPanel
from chargebook.tui.widgets.step_panel import StepPanel
from chargebook.tui.widgets.tab_strip import TabStrip
from harness import CONNECTED, ScreenHarness, load_snapshot
from screen_text import screen_text
from test_screens import _with_readings
from textual.widget import Widget

SIZE = (80, 24)


def following(snapshot: dict[str, Any], **changed: Any) -> dict[str, Any]:
    """Return the snapshot after ``snapshot`` with ``changed`` (the rest the same objects)."""
    return {**snapshot, **changed, "seq": int(snapshot.get("seq", 0)) + 1}


def count_draws(panel: Any, method: str = "_draw") -> list[int]:
    """Count the panel's draws (calls of its ``method``) from now on (the count is the list's
    one item)."""
    draws = [0]
    draw = getattr(panel, method)

    def counted(*args: Any) -> None:
        draws[0] += 1
        draw(*args)

    setattr(panel, method, counted)  # counts, changes nothing
    return draws


def count_refreshes(monkeypatch: Any, *, layouts_only: bool = False) -> list[str]:
    """From now on, note the class of every widget that asks to be drawn again (or, with
    ``layouts_only``, to lay the screen out again); the list fills as they ask."""
    asked: list[str] = []
    refresh = Widget.refresh

    def counted(self: Widget, *regions: Any, **options: Any) -> Any:
        if options.get("layout") or not layouts_only:
            asked.append(type(self).__name__)
        return refresh(self, *regions, **options)

    monkeypatch.setattr(Widget, "refresh", counted)  # counts, changes nothing
    return asked


def count_renders(monkeypatch: Any) -> list[tuple[str, int]]:
    """From now on, note (class, rows) of every widget Textual renders through its style cache
    (a widget that keeps what it rendered is not noted when it hands back kept lines)."""
    rendered: list[tuple[str, int]] = []
    render_lines = Widget.render_lines

    def counted(self: Widget, crop: Any) -> Any:
        rendered.append((type(self).__name__, crop.height))
        return render_lines(self, crop)

    monkeypatch.setattr(Widget, "render_lines", counted)  # counts, changes nothing
    return rendered


async def test_new_results_are_drawn_and_a_snapshot_without_them_draws_no_results(
    monkeypatch,
) -> None:
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
        # New results whose only change is out of sight (the last flag, one line longer, at
        # the foot) render no line in sight.
        rendered = count_renders(monkeypatch)
        *flags, last = first["results"]["flags"]
        longer = {**last, "message": last["message"] + " Said again: " + last["message"]}
        results = {**first["results"], "flags": [*flags, longer]}
        screen.show(following(failed, results=results), CONNECTED)
        await pilot.pause()
        assert "Said again" in " ".join(screen.query_one(ResultsPanel).plain_lines)
        assert "ResultsPanel" not in {name for name, _rows in rendered}


async def test_the_flags_tab_shows_its_new_count_in_its_one_line_without_a_layout() -> None:
    app = ScreenHarness(MeasureScreen, load_snapshot("reviewing_spike"))
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        strip = app.screen.query_one(TabStrip)
        assert "4 Flags (7 !)" in screen_text(app)
        layouts = []
        refresh = strip.refresh

        def counted(*regions: Any, **options: Any) -> Any:
            layouts.append(bool(options.get("layout")))
            return refresh(*regions, **options)

        strip.refresh = counted  # counts, changes nothing
        strip.relabel("flags", "4 Flags (8 !)")
        await pilot.pause()
        assert "4 Flags (8 !)" in screen_text(app)
        strip.relabel("flags", "4 Flags (12 !)")  # wider: still the same one line
        await pilot.pause()
        assert "4 Flags (12 !)" in screen_text(app)
        assert layouts == [False, False]


async def test_a_click_on_a_tab_label_shows_that_tab() -> None:
    app = ScreenHarness(MeasureScreen, load_snapshot("instrument_lost"))
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        strip = app.screen.query_one(TabStrip)
        x = strip.plain_lines[0].index("2 Sets") + 1  # the label's place in the line
        assert strip.tab_at(x) == "sets" and strip.tab_at(0) == "now"
        await pilot.click(TabStrip, offset=(x + 2, 0))  # the strip's left padding: one cell
        await pilot.pause()
        assert "Leakage check +300 V" in screen_text(app)  # the history of sets
        assert strip.active == "sets"


def one_more_reading(before: dict[str, Any]) -> dict[str, Any]:
    """Return the snapshot after ``before`` (a set of 12 without its readings) once its first
    reading, 18.5312 nC, came in: the set, the reading in progress and the prompt change."""
    after = _with_readings(before, [18.5312], needed=12)
    after["live"] = {"phase": "armed", "seq": 5, "label": "4"}
    after["prompt"] = {"text": "Deliver 100 MU now (reading 4 of 12)."}
    return after


async def test_one_new_reading_redraws_the_set_panel_and_the_step_panel_only(
    monkeypatch,
) -> None:
    before = _with_readings(load_snapshot("collecting"), [], needed=12)
    app = ScreenHarness(MeasureScreen, before)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        panel = app.screen.query_one(ReadingSetPanel)
        drawn_before = panel.plain_lines
        asked = count_refreshes(monkeypatch)
        rendered = count_renders(monkeypatch)
        app.screen.show(one_more_reading(before), CONNECTED)
        await pilot.pause()
        drawn_after, redrawn = panel.plain_lines, set(asked)
        shown = screen_text(app)  # the whole screen, from what each widget holds
    assert redrawn == {"ReadingSetPanel", "StepPanel"}
    # At every frame Textual's compositor asks every widget of the screen for its lines: one
    # that did not change hands back what it rendered before, and one that did renders only
    # its rows that changed (issue 17: the console redraws only what changed).
    widgets = {name for name, _rows in rendered}
    assert widgets & {"KeyLine", "CautionLine", "StatusLine", "ActionBar", "TabStrip"} == set()
    assert widgets & {"ResultsPanel", "MeasureScreen", "HeldHorizontal"} == set()
    assert "Do now: Deliver 100 MU now (reading 4 of 12)." in shown
    assert "k Accept" in shown or "a Arm" in shown  # the kept key help is still there
    # The title, the heading and the scale's caption are the very lines they were; the new
    # reading has its own line, and the count says so.
    changed = [y for y, line in enumerate(drawn_after) if line != drawn_before[y]]
    assert 0 not in changed and 1 not in changed
    caption = next(y for y, line in enumerate(drawn_after) if "of the mean" in line)
    assert caption not in changed
    assert "  3    18.5312  auto    ok" in drawn_after[changed[0]]
    assert "3 of 12 readings (+1 settling)" in " ".join(drawn_after)
    assert "  3    18.5312  auto    ok" in shown
    # rendered from the first line that changed to the last (the ones between looked up)
    span = changed[-1] - changed[0] + 1
    assert 0 < sum(rows for name, rows in rendered if name == "ReadingSetPanel") <= span
    assert span < len(drawn_after)


async def test_the_readings_scroll_back_with_the_keys_and_follow_the_newest_again() -> None:
    snapshot = _with_readings(
        load_snapshot("collecting"), [18.53 + 0.0001 * n for n in range(30)], needed=40
    )
    app = ScreenHarness(MeasureScreen, snapshot)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        panel = app.screen.query_one(ReadingSetPanel)
        newest = "  32    18.5329  auto"
        assert newest in " ".join(panel.plain_lines)
        panel.focus()
        await pilot.press("home")
        await pilot.pause()
        shown = screen_text(app)
        assert "  s1    18.7420  auto    settling" in shown and newest not in shown
        await pilot.press("end")
        await pilot.pause()
        assert newest in screen_text(app)


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


def test_the_columns_widths_follow_the_readings_added_and_narrow_when_one_is_replaced() -> None:
    readings = load_snapshot("collecting")["current_set"]["readings"]
    cells = CellsByReading()
    every = cells.widths(readings)
    assert every == column_widths([reading_cells(reading) for reading in readings])
    wide = {**readings[0], "charge_nC": -123456.7891, "capture": "by hand"}
    grown = cells.widths([*readings, wide])  # the readings before are the very same objects
    assert grown == column_widths([reading_cells(r) for r in [*readings, wide]]) != every
    assert cells.widths(readings) == every  # the wide one gone again: as narrow as before


async def test_following_the_newest_a_reading_mostly_draws_its_own_line_not_the_whole_area():
    """The area moves on by half its height when the newest reading reaches its foot, so
    between two such moves a new reading changes its own line only (bars aside: they move
    with the mean)."""
    held = load_snapshot("collecting")
    app = ScreenHarness(MeasureScreen, held)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        panel = app.screen.query_one(ReadingSetPanel)
        moves = 0
        for count in range(3, 33):
            before = [line[:-2] for line in panel.plain_lines if "  auto  " in line]
            after_snapshot = _with_readings(held, [18.5300 + 0.0001 * count], needed=40)
            app.screen.show(after_snapshot, CONNECTED)
            held = after_snapshot
            await pilot.pause()
            after = [line[:-2] for line in panel.plain_lines if "  auto  " in line]
            assert f"{count}    {18.5300 + 0.0001 * count:.4f}  auto" in after[-1]  # in sight
            changed = sum(1 for old, new in zip(before, after, strict=False) if old != new)
            changed += len(after) - len(before)
            moves += changed > 1
        assert moves <= 30 // 4  # a move of the area every half height (about 5 readings)


async def test_new_allowed_actions_redraw_the_buttons_and_keys_without_a_layout(monkeypatch):
    held = load_snapshot("collecting")
    app = ScreenHarness(MeasureScreen, held)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        bar, keys = app.screen.query_one(ActionBar), app.screen.query_one(KeyLine)
        assert "p Pause" in keys.plain_lines[0] and " Pause " in bar.plain_lines[0]
        layouts = count_refreshes(monkeypatch, layouts_only=True)
        allowed = ["environment.set", "session.resume", "session.stop", "session.abort"]
        app.screen.show(following(held, allowed=allowed), CONNECTED)
        await pilot.pause()
        key_words, buttons, laid_out = keys.plain_lines[0], bar.plain_lines[0], list(layouts)
        assert "p Resume" in key_words and "p Pause" not in key_words
        assert " Resume " in buttons and " Pause " not in buttons
        assert " Arm " in buttons  # shown, not allowed now (dimmed)
        assert laid_out == []


async def test_the_step_panel_keeps_its_height_when_the_prompt_takes_fewer_lines(monkeypatch):
    reviewing = load_snapshot("reviewing_spike")  # "Do now: The set is complete. ..." (2 lines)
    app = ScreenHarness(MeasureScreen, reviewing)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        panel = app.screen.query_one(StepPanel)
        height = len(panel.lines)
        layouts = count_refreshes(monkeypatch, layouts_only=True)
        prompt = {"text": "Deliver 100 MU now (reading 1 of 4)."}
        app.screen.show(following(reviewing, prompt=prompt), CONNECTED)
        await pilot.pause()
        shown, lines, laid_out = screen_text(app), panel.plain_lines, list(layouts)
    assert "Do now: Deliver 100 MU now (reading 1 of 4)." in shown
    assert len(lines) == height and lines[-1] == ""  # a blank line keeps the height
    assert "StepPanel" not in laid_out


def test_a_step_without_a_set_shows_no_count_of_more_flags() -> None:
    from chargebook.tui.widgets.reading_set import flag_summary_lines

    assert not any("more flag" in line for line in flag_summary_lines(None))
    assert not any(line.startswith("+-") for line in flag_summary_lines({"readings": []}))


async def test_the_step_panel_is_not_built_again_for_a_snapshot_of_new_results_only() -> None:
    first = load_snapshot("reviewing_spike")
    app = ScreenHarness(MeasureScreen, first)
    async with app.run_test(size=SIZE) as pilot:
        await pilot.pause()
        builds = count_draws(app.screen.query_one(StepPanel), "rebuild")
        new_results = following(first, results={**first["results"]})
        app.screen.show(new_results, CONNECTED)
        await pilot.pause()
        assert builds == [0]
        live = {"phase": "armed", "seq": 9, "label": "9"}
        app.screen.show(following(new_results, live=live), CONNECTED)
        await pilot.pause()
        assert builds == [1]
        assert "Reading 9: " in screen_text(app)
