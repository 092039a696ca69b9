"""The plan's steps with how far each has got: accepted, current, skipped, still to do."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from chargebook.tui import text
from chargebook.tui.widgets.text_block import TextBlock
from rich.table import Table

#: Text marker per step status, readable without colour.
STEP_MARKERS: dict[str, str] = {
    "accepted": "done",
    "current": "> now",
    "skipped": "skipped",
    "pending": "to do",
}


def plan_table(plan: Sequence[dict[str, Any]]) -> Table:
    """Return one row per plan step: number, purpose, bias, readings, status."""
    table = Table(box=None, padding=(0, 1), show_edge=False, expand=True)
    for column in ("Step", "Purpose", "Bias", "Readings", "Status"):
        table.add_column(column)
    for step in plan:
        mu = f" × {step['mu_per_reading']:g} MU" if step.get("mu_per_reading") else ""
        purpose = text.purpose(step["purpose"]) + (" (optional)" if step.get("optional") else "")
        status = STEP_MARKERS.get(step.get("status", ""), step.get("status", ""))
        cells = (step["index"] + 1, purpose, text.bias_V(step["bias_V"]), f"{step['readings']}{mu}")
        table.add_row(*text.plain_row((*cells, status)))
    return table


class PlanView(TextBlock):
    """The plan as a table of steps."""

    def show_plan(self, plan: Sequence[dict[str, Any]]) -> None:
        """Show the steps of ``Snapshot.plan``."""
        self.show_built(list(plan), lambda: plan_table(plan))
