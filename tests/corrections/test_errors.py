"""InputError names the field, the value and what is allowed; Flag is plain data."""

from __future__ import annotations

import json

import pytest
from chargebook.corrections.errors import Flag, InputError


def test_message_names_field_value_and_range() -> None:
    error = InputError("temperature_C", 80, "10 to 40 °C")
    # The wording the brief asks for, verbatim (common practice for this project).
    assert str(error) == "temperature_C = 80 is outside the allowed range 10 to 40 °C"
    assert (error.field, error.value, error.allowed) == ("temperature_C", 80, "10 to 40 °C")
    assert isinstance(error, ValueError)


def test_other_problems_keep_field_value_and_allowed() -> None:
    error = InputError("temperature_C", "warm", "10 to 40 °C", "is not a number")
    assert str(error) == "temperature_C = 'warm' is not a number (allowed: 10 to 40 °C)"


def test_flag_to_dict_is_json_ready() -> None:
    flag = Flag("k_s_large", "k_s is large.", "warning")
    assert json.loads(json.dumps(flag.to_dict())) == {
        "code": "k_s_large",
        "message": "k_s is large.",
        "severity": "warning",
    }


def test_flag_refuses_an_unknown_severity() -> None:
    with pytest.raises(InputError, match="severity"):
        Flag("x", "y", "fatal")  # type: ignore[arg-type]
