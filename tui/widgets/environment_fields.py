"""The air temperature, pressure (with its unit) and humidity entries, checked as typed."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from chargebook.acquire.protocol import PRESSURE_UNITS
from chargebook.corrections import units
from chargebook.tui import checks, text
from chargebook.tui.widgets.fields import Field, choice, conversion_note
from textual import on
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import Input, Select, Static

#: Daemon field names (as in its error data) -> the entry that shows the problem.
FIELD_FOR_PARAM: dict[str, str] = {
    "temperature_C": "temperature_C",
    "pressure": "pressure",
    "pressure_unit": "pressure",
    "humidity_pct": "humidity_pct",
}


def last_entry_words(entry: Mapping[str, Any]) -> str:
    """Return the offer of the last entry: what it held, when, and what to do."""
    pressure = entry.get("pressure_entered", entry.get("pressure_kPa"))
    unit = entry.get("pressure_unit") or "kPa"
    return (
        f"Last entry: {_entered(entry.get('temperature_C'))} °C, {_entered(pressure)} {unit}, at "
        f"{text.local_time(entry.get('recorded_at'))} ({entry.get('source') or 'console'}). "
        "Read the thermometer and barometer again, or press Ctrl+L if these are still true."
    )


def _entered(value: Any) -> str:
    return "" if value is None else f"{value:g}"


class EnvironmentFields(Vertical):
    """Temperature in °C, pressure in kPa, hPa or mmHg, optional humidity in %."""

    def __init__(
        self, current: Mapping[str, Any] | None = None, *, ask_again: bool = False
    ) -> None:
        """``current``: the entry to offer. With ``ask_again`` (a new session), an entry that
        was recorded earlier (it has ``recorded_at``) is not filled in: it is offered, and used
        only when the operator confirms it (:meth:`use_last_entry`)."""
        super().__init__(classes="environment-fields")
        self.current = dict(current or {})
        self.pressure_unit = str(self.current.get("pressure_unit") or "kPa")
        self.last_entry = self.current if ask_again and self.current.get("recorded_at") else None
        self.confirmed_last = False

    def compose(self) -> ComposeResult:
        pressure = self.current.get("pressure_entered", self.current.get("pressure_kPa"))
        shown = self.current if self.last_entry is None else {}
        if self.last_entry is not None:
            yield Static(last_entry_words(self.last_entry), id="last-entry", markup=False)
        yield Field(
            "Air temperature °C",
            "temperature_C",
            _entered(shown.get("temperature_C")),
            check=checks.TEMPERATURE,
        )
        yield Field(
            "Air pressure",
            "pressure",
            _entered(pressure if shown else None),
            check=checks.pressure_in(lambda: self.pressure_unit),
            suffix=choice(
                "pressure_unit", [(name, name) for name in PRESSURE_UNITS], self.pressure_unit
            ),
        )
        yield Field(
            "Humidity % (optional)",
            "humidity_pct",
            _entered(shown.get("humidity_pct")),
            check=checks.HUMIDITY,
        )

    def use_last_entry(self) -> None:
        """Fill in the last entry as confirmed by the operator (it is recorded as confirmed)."""
        if self.last_entry is None:
            return
        entry = self.last_entry
        self.field("temperature_C").input.value = _entered(entry.get("temperature_C"))
        self.field("pressure").input.value = _entered(
            entry.get("pressure_entered", entry.get("pressure_kPa"))
        )
        self.field("humidity_pct").input.value = _entered(entry.get("humidity_pct"))
        self.confirmed_last = True

    def source(self, typed: str = "typed at the console") -> str:
        """Return the source to record: typed, or the last entry confirmed for a new session."""
        if self.confirmed_last and self.last_entry is not None:
            when = text.local_time(self.last_entry.get("recorded_at"))
            return f"{typed}: the entry of {when} confirmed by the operator"
        return typed

    def is_valid(self) -> bool:
        """Return True if every entry passes its check (nothing is shown)."""
        return all(field.is_valid() for field in self.query(Field))

    def field(self, name: str) -> Field:
        """Return the entry for ``name`` (temperature_C, pressure or humidity_pct)."""
        return self.query_one(f"#field-{name}", Field)

    @on(Select.Changed, "#choice-pressure_unit")
    def unit_changed(self, event: Select.Changed) -> None:
        self.pressure_unit = str(event.value)
        field = self.field("pressure")
        if field.value or field.touched:  # a unit set as the form opens is no cause to complain
            field.recheck()
        self._show_conversion()

    @on(Input.Changed, "#input-pressure")
    def pressure_changed(self) -> None:
        self._show_conversion()

    def on_mount(self) -> None:
        self._show_conversion()

    def _show_conversion(self) -> None:
        """Show the pressure in kPa under an entry typed in hPa or mmHg, as the daemon converts."""
        field = self.field("pressure")
        field.note = conversion_note(
            field.value, self.pressure_unit, units.pressure_kPa, "kPa", digits=3
        )

    def params(self) -> dict[str, Any] | None:
        """Return the ``environment.set`` params, or None if an entry is wrong (each says why)."""
        fields = [self.field(name) for name in ("temperature_C", "pressure", "humidity_pct")]
        if not all([field.recheck() for field in fields]):
            return None
        params: dict[str, Any] = {
            "temperature_C": float(self.field("temperature_C").value),
            "pressure": float(self.field("pressure").value),
            "pressure_unit": self.pressure_unit,
        }
        humidity = self.field("humidity_pct").value
        if humidity:
            params["humidity_pct"] = float(humidity)
        return params

    def show_refusal(self, field_name: str | None, message: str) -> bool:
        """Show the daemon's refusal under the entry it names; return False if none matches."""
        for prefix, entry in FIELD_FOR_PARAM.items():
            if field_name and field_name.split("[")[0].startswith(prefix):
                self.field(entry).show_problem(message)
                return True
        return False
