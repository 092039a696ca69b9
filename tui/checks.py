"""Checks of what the operator types, run on every keystroke.

The ranges and the wording come from ``chargebook.corrections`` (the same checks the daemon
applies), so the console refuses 80 °C with exactly the message the daemon would give, before
anything is sent. The daemon checks again and remains the authority.
"""

from __future__ import annotations

from collections.abc import Callable

from chargebook.corrections import limits, units
from chargebook.corrections.errors import InputError, describe_value
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
            raise InputError(field, "", "", "is empty")
        return value.strip()

    return check


def operator_words(error: ValueError, label: str) -> str:
    """Return what is wrong with an entry in the operator's words, named by its label.

    The daemon's messages name its parameters (``temperature_C = 80 ...``); the form names the
    entry as the operator sees it ("Air temperature °C: 80 is outside 10 to 40 °C").
    """
    if not isinstance(error, InputError):
        return f"{label}: {error}"
    if error.value in ("", None):
        return f"{label}: enter a value" + (f" ({error.allowed})" if error.allowed else "")
    shown = describe_value(error.value)
    if error.problem is None:
        return f"{label}: {shown} is outside {error.allowed}"
    return f"{label}: {shown} {error.problem} (allowed: {error.allowed})"


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
    """A Textual validator that runs a :data:`Check` and says what is wrong in the operator's
    words, naming the entry by ``label``."""

    def __init__(self, check: Check, label: str) -> None:
        super().__init__()
        self.check = check
        self.label = label

    def validate(self, value: str) -> ValidationResult:
        """Return success, or a failure carrying the message that names the entry and range."""
        try:
            self.check(value)
        except ValueError as error:
            return self.failure(operator_words(error, self.label))
        return self.success()
