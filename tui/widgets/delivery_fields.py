"""The plan and the MU per reading of a new session, chosen in the setup form.

The plans are those the daemon offers (the snapshot's ``plans``, its own first); the MU per
reading starts from the chosen plan's and may be changed, checked as typed against the range
the daemon applies (``corrections.limits.MONITOR_UNITS``). The daemon checks it again against
the plan (the compared steps all take it: the equal-MU rule).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from chargebook.corrections import limits
from chargebook.tui import checks
from chargebook.tui.widgets.fields import ChoiceField, Field
from textual import on
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import Select

MU_FIELD = "mu_per_reading"


def _plan_label(plan: Mapping[str, Any]) -> str:
    own = " (this station's)" if plan.get("daemon_default") else ""
    return f"{plan.get('name')}{own}: {plan.get('description') or 'no description'}"


class DeliveryFields(Vertical):
    """Plan and MU per reading; :meth:`params` gives what ``session.start`` takes."""

    def __init__(self, plans: Sequence[Mapping[str, Any]]) -> None:
        super().__init__(classes="delivery-fields")
        self.plans = [dict(plan) for plan in plans]

    def compose(self) -> ComposeResult:
        if self.plans:
            options = [(_plan_label(plan), str(plan["name"])) for plan in self.plans]
            yield ChoiceField("Plan", "plan", options, str(self.plans[0]["name"]))
        first = self.plans[0].get("mu_per_reading") if self.plans else None
        yield Field(
            "MU per reading",
            MU_FIELD,
            "" if first is None else f"{first:g}",
            check=checks.optional(checks.in_range(MU_FIELD, limits.MONITOR_UNITS)),
        )

    @property
    def plan(self) -> Mapping[str, Any] | None:
        """Return the plan chosen, or None when the daemon offered none."""
        if not self.plans:
            return None
        name = self.query_one(ChoiceField).value
        return next((plan for plan in self.plans if plan["name"] == name), None)

    @on(Select.Changed, "#choice-plan")
    def plan_changed(self) -> None:
        """Start the MU per reading from the plan just chosen."""
        plan = self.plan
        if plan is not None and plan.get("mu_per_reading") is not None:
            self.query_one(f"#field-{MU_FIELD}", Field).input.value = f"{plan['mu_per_reading']:g}"

    def params(self) -> dict[str, Any] | None:
        """Return ``plan`` (unless the daemon's own) and ``mu_per_reading`` (unless the plan's),
        or None when the MU entry is wrong (it says why)."""
        field = self.query_one(f"#field-{MU_FIELD}", Field)
        if not field.recheck():
            return None
        params: dict[str, Any] = {}
        plan = self.plan
        if plan is not None and not plan.get("daemon_default"):
            params["plan"] = plan["name"]
        if field.value.strip():
            mu = float(field.value)
            if plan is None or mu != plan.get("mu_per_reading"):
                params[MU_FIELD] = mu
        return params

    def show_refusal(self, field_name: str | None, message: str) -> bool:
        """Show the daemon's refusal of the MU under its entry; False if it names another."""
        if field_name and field_name.split(".")[-1].endswith(MU_FIELD):
            self.query_one(f"#field-{MU_FIELD}", Field).show_problem(message)
            return True
        return False
