"""The current step, what the operator must do now, the reading in progress and plan progress."""

from __future__ import annotations

from typing import Any

from chargebook.tui import snapshot_view
from chargebook.tui.widgets.drawn_when_composed import DrawnWhenComposed
from chargebook.tui.widgets.text_block import TextBlock
from textual.app import ComposeResult
from textual.containers import Horizontal, Vertical
from textual.reactive import reactive
from textual.widgets import ProgressBar


class StepPanel(DrawnWhenComposed, Vertical):
    """Step heading with progress, then "Do now: …" in the daemon's words, then the live reading."""

    snapshot: reactive[dict[str, Any] | None] = reactive(None, always_update=True, repaint=False)
    #: Whether the console hears from the daemon; set before ``snapshot`` by the screen.
    connected: bool = True

    def compose(self) -> ComposeResult:
        with Horizontal(id="step-heading-row"):
            yield TextBlock(id="step-heading")
            yield ProgressBar(show_eta=False, show_percentage=False, id="plan-progress")
            yield TextBlock(id="plan-progress-text")
        yield TextBlock(id="step-notice")
        yield TextBlock(id="step-prompt")
        yield TextBlock(id="step-live")

    def watch_snapshot(self, snapshot: dict[str, Any] | None) -> None:
        self.redraw()

    def _draw_held(self) -> None:
        if self.snapshot is not None:
            self._draw(self.snapshot)

    def _draw(self, snapshot: dict[str, Any]) -> None:
        self.query_one("#step-heading", TextBlock).show(snapshot_view.step_heading(snapshot))
        done, total = snapshot_view.steps_done(snapshot)
        bar = self.query_one(ProgressBar)
        if (bar.total, bar.progress) != (max(total, 1), done):
            bar.update(total=max(total, 1), progress=done)
        self.query_one("#plan-progress-text", TextBlock).show(f"{done}/{total} done")
        notice = self.query_one("#step-notice", TextBlock)
        notice.show(f"!! {snapshot['notice']}" if snapshot.get("notice") else "")
        notice.display = bool(snapshot.get("notice"))
        prompt = self.query_one("#step-prompt", TextBlock)
        prompt.show(f"Do now: {snapshot_view.prompt_text(snapshot, self.connected)}")
        prompt.set_class(not self.connected, "-trouble")
        self.query_one("#step-live", TextBlock).show(snapshot_view.live_text(snapshot))
