"""When a changed text may skip Textual's layout: only when it keeps its height, as Textual
wraps it at the widget's width; and no line of the new text is ever cut off."""

from __future__ import annotations

from chargebook.tui.widgets.text_block import TextBlock
from screen_text import screen_text
from textual.app import App, ComposeResult

WIDTH = 20


class OneBlock(App[None]):
    """A TextBlock 20 cells wide, counting the layouts it asks for."""

    CSS = f"TextBlock {{ width: {WIDTH}; height: auto; }} .fixed {{ height: 2; }}"

    def __init__(self, first: str, **options: object) -> None:
        super().__init__()
        self.first = first
        self.options = options
        self.layouts = 0

    def compose(self) -> ComposeResult:
        yield TextBlock(self.first, id="block", **self.options)

    def count_layouts(self) -> TextBlock:
        block = self.query_one("#block", TextBlock)
        refresh = block.refresh

        def counted(*regions, **options):
            self.layouts += bool(options.get("layout"))
            return refresh(*regions, **options)

        block.refresh = counted  # type: ignore[method-assign]  # counts, changes nothing
        return block


async def shown(first: str, then: str, **options: object) -> tuple[int, list[str]]:
    """Show ``first``, then ``then``; return (layouts asked for by ``then``, screen lines)."""
    layouts, lines, _height = await shown_with_height(first, then, **options)
    return layouts, lines


async def shown_with_height(first: str, then: str, **options: object) -> tuple[int, list[str], int]:
    """Show ``first``, then ``then``; return (layouts asked for by ``then``, the screen's
    lines that are not blank, the block's height in lines)."""
    app = OneBlock(first, **options)
    async with app.run_test(size=(40, 8)) as pilot:
        await pilot.pause()
        block = app.count_layouts()
        block.show(then)
        await pilot.pause()
        lines = [line.rstrip() for line in screen_text(app).splitlines()]
        height = block.size.height
    return app.layouts, [line for line in lines if line], height


async def test_a_wrapped_text_whose_figures_change_keeps_its_height_without_a_layout() -> None:
    # 36 characters: two lines at 20 cells, before and after
    layouts, lines = await shown(
        "12 of 100 readings · mean 20.01 nC", "13 of 100 readings · mean 20.02 nC"
    )
    assert layouts == 0
    assert lines == ["13 of 100 readings ·", "mean 20.02 nC"]


async def test_a_text_that_wraps_to_more_lines_is_laid_out_and_shown_whole() -> None:
    layouts, lines = await shown("ok", "#3 ! outlier: look for a spike before accepting")
    assert layouts >= 1
    assert " ".join(lines) == "#3 ! outlier: look for a spike before accepting"


async def test_wide_characters_count_by_their_cells() -> None:
    # ten two-cell characters fill 20 cells; eleven take a second line
    layouts, lines = await shown("表" * 10, "表" * 11)
    assert layouts >= 1 and lines == ["表" * 10, "表"]


async def test_the_same_text_again_draws_nothing() -> None:
    layouts, lines = await shown("ok", "ok")
    assert layouts == 0 and lines == ["ok"]


async def test_a_block_whose_height_the_style_sheet_fixes_is_never_laid_out_again() -> None:
    # one line, then two: the block is two lines high whatever it shows
    layouts, lines, height = await shown_with_height("ok", "first line\nsecond", classes="fixed")
    assert layouts == 0 and height == 2
    assert lines == ["first line", "second"]


async def test_a_block_that_keeps_its_height_pads_a_shorter_text_with_blank_lines() -> None:
    # "#3 ! outlier ..." wraps to three lines at 20 cells; "ok" takes one
    first = "#3 ! outlier: look for a spike before accepting"
    layouts, lines, height = await shown_with_height(first, "ok", keep_height=True)
    assert layouts == 0 and height == 3
    assert lines == ["ok"]


async def test_a_block_that_keeps_its_height_still_grows_to_show_a_longer_text() -> None:
    then = "#3 ! outlier: look for a spike before accepting"
    layouts, lines, height = await shown_with_height("ok", then, keep_height=True)
    assert layouts >= 1 and height == 3
    assert " ".join(lines) == then
