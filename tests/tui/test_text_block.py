"""When a changed text may skip Textual's layout: only when it keeps its height."""

from chargebook.tui.widgets.text_block import same_height


def test_same_line_count_and_every_line_narrower_than_the_widget_keeps_the_height() -> None:
    assert same_height("12 of 100 readings\nok", "13 of 100 readings\nok", 38)


def test_another_line_count_needs_a_layout() -> None:
    assert not same_height("ok", "ok\n#3 ! outlier", 38)


def test_a_line_that_could_wrap_needs_a_layout() -> None:
    assert not same_height("short", "x" * 38, 38)  # exactly the width: may wrap, be safe
    assert not same_height("x" * 40, "short", 38)  # the old text wrapped


def test_wide_characters_count_by_their_cells() -> None:
    assert not same_height("ab", "表表", 4)  # two cells each: four cells in a 4-cell widget
    assert same_height("a · b", "c · d", 6)


def test_a_widget_not_laid_out_yet_needs_a_layout() -> None:
    assert not same_height("a", "b", 0)
