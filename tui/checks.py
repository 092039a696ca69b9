"""Checks of what the operator types, run on every keystroke.

The ranges and the wording come from ``chargebook.corrections`` (the same checks the daemon
applies), so the console refuses 80 °C with exactly the message the daemon would give, before
anything is sent. The daemon checks again and remains the authority.
"""

from __future__ import annotations

from collections.abc import Callable

from chargebook.corrections import limits, units
from textual.validation import ValidationResult, Validator

#: A check takes the text as typed and raises ValueError (InputError) naming the field if wrong.
Check = Callable[[str], object]


def as_typed(value: str) -> object:
    """Return the typed text as a float when it reads as one, else the text itself."""
    try:
        return float(value.strip())
    except ValueError:
        return value.strip()


def in_range(field: str, allowed: limits.Range) -> Check:
    """Return a check that ``field`` is a number within ``allowed``."""

    def check(value: str) -> object:
        return allowed.check(field, as_typed(value))

    return check


def optional(check: Check) -> Check:
    """Return a check that accepts an empty entry and otherwise applies ``check``."""

    def check_optional(value: str) -> object:
        return None if not value.strip() else check(value)

    return check_optional


def required_text(field: str) -> Check:
    """Return a check that ``field`` is not left empty."""

    def check(value: str) -> object:
        if not value.strip():
            raise ValueError(f"{field} is empty: enter a value")
        return value.strip()

    return check


def pressure_in(unit_of: Callable[[], str]) -> Check:
    """Return a check of a pressure typed in the unit that ``unit_of()`` names (kPa, hPa, mmHg)."""

    def check(value: str) -> object:
        return units.pressure_kPa(as_typed(value), unit_of())

    return check


def calibration_in(unit_of: Callable[[], str]) -> Check:
    """Return a check of N_D,w typed in the unit that ``unit_of()`` names (Gy/nC, Gy/C, cGy/nC)."""

    def check(value: str) -> object:
        return units.N_Dw_Gy_per_nC(as_typed(value), unit_of())

    return check


TEMPERATURE = in_range("temperature_C", limits.TEMPERATURE_C)
HUMIDITY = optional(in_range("humidity_pct", limits.HUMIDITY_PCT))


class CheckValidator(Validator):
    """A Textual validator that runs a :data:`Check` and reports its message on failure."""

    def __init__(self, check: Check) -> None:
        super().__init__()
        self.check = check

    def validate(self, value: str) -> ValidationResult:
        """Return success, or a failure carrying the message that names the field and range."""
        try:
            self.check(value)
        except ValueError as error:
            return self.failure(str(error))
        return self.success()
