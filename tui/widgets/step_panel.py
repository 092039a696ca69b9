"""The current step, what the operator must do now, the reading in progress and plan progress."""

from __future__ import annotations

from typing import Any

from chargebook.tui import snapshot_view
from textual.app import ComposeResult
from textual.containers import Horizontal, Vertical
from textual.reactive import reactive
from textual.widgets import ProgressBar, Static


class StepPanel(Vertical):
    """Step heading with progress, then "Do now: …" in the daemon's words, then the live reading."""

    snapshot: reactive[dict[str, Any] | None] = reactive(None, always_update=True)

    def compose(self) -> ComposeResult:
        with Horizontal(id="step-heading-row"):
            yield Static("", id="step-heading", markup=False)
            yield ProgressBar(show_eta=False, show_percentage=False, id="plan-progress")
            yield Static("", id="plan-progress-text", markup=False)
        yield Static("", id="step-prompt", markup=False)
        yield Static("", id="step-live", markup=False)

    def watch_snapshot(self, snapshot: dict[str, Any] | None) -> None:
        if snapshot is None:
            return
        self.query_one("#step-heading", Static).update(snapshot_view.step_heading(snapshot))
        done, total = snapshot_view.steps_done(snapshot)
        self.query_one(ProgressBar).update(total=max(total, 1), progress=done)
        self.query_one("#plan-progress-text", Static).update(f"{done}/{total} done")
        self.query_one("#step-prompt", Static).update(
            f"Do now: {snapshot_view.prompt_text(snapshot)}"
        )
        self.query_one("#step-live", Static).update(snapshot_view.live_text(snapshot))
