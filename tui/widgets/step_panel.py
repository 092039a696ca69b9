"""The current step, what the operator must do now, the reading in progress and plan progress."""

from __future__ import annotations

from typing import Any, ClassVar

from chargebook.tui import snapshot_view
from chargebook.tui.widgets.own_lines import Line, OwnLines, at_most, cut, text_line, wrapped
from rich.segment import Segment
from textual.reactive import reactive

#: Cells of the plan's progress bar, and of the "2/6 done" beside it.
BAR_CELLS = 12
DONE_CELLS = 9
#: The bar's glyphs: steps done, the edge of what is left, what is left.
BAR_DONE, BAR_EDGE, BAR_LEFT = "━", "╺", "━"


def progress_bar(done: int, total: int, cells: int = BAR_CELLS) -> tuple[str, str]:
    """Return the plan's progress as (the part done, the part left), ``cells`` in all."""
    filled = round(cells * done / total) if total else 0
    left = cells - filled
    return BAR_DONE * filled, (BAR_EDGE + BAR_LEFT * (left - 1)) if left else ""


#: The parts of a snapshot the step panel is drawn from.
STEP_PARTS = ("plan", "step_index", "notice", "prompt", "state", "live")


class StepPanel(OwnLines):
    """Step heading with the plan's progress, then a notice from the daemon if any, "Do now: …"
    in the daemon's words, then the reading in progress: one widget drawing its own lines, so a
    reading redraws only the prompt's and the live reading's lines. It keeps the height it
    reached (blank lines under shorter text), so the screen is not laid out again as the
    prompt's wording changes."""

    COMPONENT_CLASSES: ClassVar[set[str]] = {
        "step-panel--heading",
        "step-panel--notice",
        "step-panel--trouble",
        "step-panel--live",
        "step-panel--done",
        "step-panel--left",
    }
    DEFAULT_CSS = """
    StepPanel > .step-panel--heading { text-style: bold; }
    StepPanel > .step-panel--notice { background: $warning; color: $text; text-style: bold; }
    StepPanel > .step-panel--trouble { background: $error; color: $text; text-style: bold; }
    StepPanel > .step-panel--live { color: $text-muted; }
    StepPanel > .step-panel--done { color: $primary; }
    StepPanel > .step-panel--left { color: $foreground 20%; }
    """

    snapshot: reactive[dict[str, Any] | None] = reactive(None, always_update=True, repaint=False)
    #: Whether the console hears from the daemon; set before ``snapshot`` by the screen.
    connected: bool = True
    _tallest = 0  # the most lines the panel has shown
    _drawn_from: tuple[object, ...] = ()  # connected, then the STEP_PARTS drawn last

    def watch_snapshot(self, snapshot: dict[str, Any] | None) -> None:
        if snapshot is None:
            return
        parts = (self.connected, *(snapshot.get(key) for key in STEP_PARTS))
        if len(parts) == len(self._drawn_from) and all(
            part is drawn for part, drawn in zip(parts, self._drawn_from, strict=True)
        ):
            return  # the client's very objects: nothing the panel shows changed (new results)
        self._drawn_from = parts
        self.rebuild()

    def on_mount(self) -> None:
        self.rebuild()  # a snapshot given before the panel was mounted

    def rebuild(self) -> None:
        """Build the panel's lines from the snapshot held, at the panel's width."""
        width, snapshot = self.line_width, self.snapshot
        if width <= 0 or snapshot is None:
            return
        live = cut(snapshot_view.live_text(snapshot), width)
        lines = [
            *self._heading(snapshot, width),
            *self._notice(snapshot, width),
            *self._prompt(snapshot, width),
            text_line(live, self.part_style("step-panel--live")),
        ]
        # Never shorter than it has been: a prompt of one line after one of two (a set's end,
        # then the next set's start) would lay the screen out again while readings arrive.
        self._tallest = max(self._tallest, len(lines))
        self.show_lines(lines + [()] * (self._tallest - len(lines)))

    def _heading(self, snapshot: dict[str, Any], width: int) -> list[Line]:
        """The step in words (wrapped, never cut), the progress bar and "2/6 done" beside it."""
        done, total = snapshot_view.steps_done(snapshot)
        words_width = max(width - BAR_CELLS - DONE_CELLS - 2, 1)
        bold = self.part_style("step-panel--heading")
        first, *rest = wrapped([snapshot_view.step_heading(snapshot)], words_width)
        done_part, left_part = progress_bar(done, max(total, 1))
        heading = (
            Segment(first.ljust(words_width) + " ", bold),
            Segment(done_part, self.part_style("step-panel--done")),
            Segment(left_part, self.part_style("step-panel--left")),
            Segment(f" {done}/{total} done".rjust(DONE_CELLS + 1)),
        )
        return [heading, *(text_line(line, bold) for line in rest)]

    def _notice(self, snapshot: dict[str, Any], width: int) -> list[Line]:
        """The daemon's notice (a reading discarded...), at most two lines, or none."""
        if not snapshot.get("notice"):
            return []
        style = self.part_style("step-panel--notice")
        lines = at_most(wrapped([f"!! {snapshot['notice']}"], width), 2)
        return [text_line(line.ljust(width), style) for line in lines]

    def _prompt(self, snapshot: dict[str, Any], width: int) -> list[Line]:
        """ "Do now: …" in at most two lines; in the trouble colour while not connected."""
        words = f"Do now: {snapshot_view.prompt_text(snapshot, self.connected)}"
        lines = at_most(wrapped([words], width), 2)
        if self.connected:
            return [text_line(line) for line in lines]
        style = self.part_style("step-panel--trouble")
        return [text_line(line.ljust(width), style) for line in lines]
