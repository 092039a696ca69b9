"""Lines a widget draws itself: wrapping as the standard library wraps, and which lines of a
new list changed (only those are drawn again)."""

from __future__ import annotations

import textwrap

from chargebook.tui.widgets.own_lines import HeldLines, runs, text_line, wrapped
from hypothesis import given
from hypothesis import strategies as st

#: Words, runs of spaces, no-break spaces, other white space and hyphens, as wrapping meets them.
PIECES = st.sampled_from(["ab", "c", "deflection", "-", " ", "  ", "\u00a0", "\t", "\n", "x."])


@given(st.lists(PIECES, max_size=24).map("".join), st.integers(min_value=1, max_value=30))
def test_a_line_is_wrapped_exactly_as_the_standard_librarys_textwrap_wraps_it(
    line: str, width: int
) -> None:
    # The reference: Python's own textwrap.wrap (no hyphen breaks), "" for nothing to show.
    assert wrapped([line], width) == (textwrap.wrap(line, width, break_on_hyphens=False) or [""])


def test_a_line_that_fits_is_kept_as_it_is_and_a_long_one_is_wrapped_on_spaces() -> None:
    assert wrapped(["Mean 18.5312\u00a0nC"], 20) == ["Mean 18.5312\u00a0nC"]
    assert wrapped(["3 of 12 readings · Mean 18.5312 nC"], 20) == [
        "3 of 12 readings ·",
        "Mean 18.5312 nC",
    ]


def test_only_the_lines_that_changed_are_named_run_by_run() -> None:
    held = HeldLines()
    lines = [text_line(f"line {n}") for n in range(8)]
    assert held.replace(lines) == [(0, 8)]
    lines[2], lines[3], lines[6] = text_line("new 2"), text_line("new 3"), text_line("new 6")
    assert held.replace(lines) == [(2, 4), (6, 7)]  # not the lines 4 and 5 between them
    assert held.replace(lines) == []
    assert held.replace(lines[:7]) == [(7, 8)]  # a line gone


def test_rows_are_grouped_in_runs_of_consecutive_rows() -> None:
    assert runs([]) == []
    assert runs([3]) == [(3, 4)]
    assert runs([0, 1, 2, 5, 7, 8]) == [(0, 3), (5, 6), (7, 9)]
