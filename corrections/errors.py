"""The two ways the corrections library says something is wrong: an error or a flag.

An :class:`InputError` is raised for input that cannot be used (not a number, outside its
plausible range, a voltage ratio with no tabulated coefficients, readings whose sign contradicts
the bias). Its message names the field, the value and what is allowed, so the operator can fix
the entry. A :class:`Flag` reports something a physicist may knowingly accept (k_s above 1.05,
a polarity effect above 0.4 %, unstable readings): it is returned with the results, never raised.
"""

from __future__ import annotations

import enum
import numbers
from dataclasses import dataclass
from typing import Literal, TypeVar

Severity = Literal["info", "warning", "error"]
Choice = TypeVar("Choice", bound=enum.StrEnum)
SEVERITIES: tuple[str, ...] = ("info", "warning", "error")


def describe_value(value: object) -> str:
    """Return a short printable form of an input value for an error message."""
    if isinstance(value, bool) or value is None:
        return repr(value)
    # numbers.Real holds numpy's integers and floats too, without importing numpy (a command
    # that only reads the record imports this module and no numpy)
    if isinstance(value, numbers.Real):
        return f"{float(value):g}"
    if isinstance(value, str):
        return repr(value)
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


class InputError(ValueError):
    """Input that cannot be used: the message names the field, its value and the allowed range.

    ``field`` is the input's name (``temperature_C``, ``routine_nC[2]``, ``environment.pressure``),
    ``value`` the value as given, ``allowed`` a plain description of what is accepted.
    ``problem`` replaces the default wording "is outside the allowed range" when the value is
    wrong in another way (not a number, not in a table, contradicting another input).
    """

    def __init__(self, field: str, value: object, allowed: str, problem: str | None = None):
        self.field = field
        self.value = value
        self.allowed = allowed
        self.problem = problem
        shown = describe_value(value)
        if problem is None:
            message = f"{field} = {shown} is outside the allowed range {allowed}"
        elif value is None and problem == "is missing":
            message = f"{field} is missing (allowed: {allowed})"
        else:
            message = f"{field} = {shown} {problem} (allowed: {allowed})"
        super().__init__(message)


@dataclass(frozen=True)
class Flag:
    """A finding the operator should read: a stable ``code``, a plain-words ``message``.

    ``severity`` is "info" (stated for the record), "warning" (look before you accept) or
    "error" (the result should not be used as it stands).
    """

    code: str
    message: str
    severity: Severity = "warning"

    def __post_init__(self) -> None:
        if self.severity not in SEVERITIES:
            raise InputError("severity", self.severity, "info, warning or error", "is not known")

    def to_dict(self) -> dict[str, str]:
        """Return the flag as JSON-ready plain types."""
        return {"code": self.code, "message": self.message, "severity": self.severity}


def parse_choice(choices: type[Choice], field: str, value: object, what: str) -> Choice:
    """Return the member of ``choices`` named by ``value`` (case and spaces ignored).

    InputError naming ``field``, the value and the allowed names ("is not a known {what}")
    otherwise.
    """
    try:
        return choices(value.strip().lower() if isinstance(value, str) else value)
    except ValueError:
        allowed = ", ".join(choice.value for choice in choices)
        raise InputError(field, value, allowed, f"is not a known {what}") from None
