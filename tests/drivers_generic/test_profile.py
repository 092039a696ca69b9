"""Profiles: the shipped ones load, and a bad profile is refused naming the field and the limits."""

from __future__ import annotations

from pathlib import Path

import pytest
from chargebook.drivers_generic import ProfileError, available_profiles, load_profile
from chargebook.drivers_generic.interface import Capability, SettingOutOfRange

QUERY_PLAIN = (Path(load_profile("query-plain").source)).read_text(encoding="utf-8")


def test_the_shipped_profiles_are_the_three_dialects_and_scpi():
    assert available_profiles() == [
        "push-exponent",
        "query-engineering",
        "query-plain",
        "scpi-generic",
    ]


def test_the_dialects_differ_in_baud_terminators_number_format_and_status():
    profiles = {
        name: load_profile(name) for name in ("query-plain", "push-exponent", "query-engineering")
    }
    assert len({p.port.baud for p in profiles.values()}) == 3
    assert len({p.framing.read_terminator for p in profiles.values()}) == 3
    assert {p.reading.number_format for p in profiles.values()} == {
        "plain",
        "exponent",
        "engineering",
    }
    assert len({tuple(p.reading.status_map) for p in profiles.values()}) == 3
    assert {p.mode for p in profiles.values()} == {"query", "push"}


def test_at_least_one_profile_lacks_set_bias_and_one_has_it():
    with_bias = {
        n for n in available_profiles() if Capability.SET_BIAS in load_profile(n).capabilities
    }
    assert with_bias and with_bias != set(available_profiles())


def test_a_profile_can_be_given_by_path(tmp_path):
    path = tmp_path / "my-meter.toml"
    path.write_text(
        QUERY_PLAIN.replace('name = "query-plain"', 'name = "my-meter"'), encoding="utf-8"
    )
    assert load_profile(path).name == "my-meter"
    assert load_profile(str(path)).name == "my-meter"


def test_an_unknown_name_lists_the_shipped_profiles():
    with pytest.raises(
        ProfileError, match="push-exponent, query-engineering, query-plain, scpi-generic"
    ):
        load_profile("no-such-meter")


@pytest.mark.parametrize(
    ("old", "new", "field", "allowed"),
    [
        ("baud = 9600", "baud = 0", "port.baud", "50 to 4000000"),
        ('parity = "N"', 'parity = "X"', "port.parity", "N, E, O, M, S"),
        ("stopbits = 1 ", "stopbits = 3 ", "port.stopbits", "1, 1.5, 2"),
        ('flow_control = "none"', 'flow_control = "pigeon"', "port.flow_control", "rtscts"),
        ("max_line_bytes = 128", "max_line_bytes = 10", "framing.max_line_bytes", "16 to"),
        ("retries = 2", "retries = -1", "timing.retries", "0 to 20"),
        ('number_format = "plain"', 'number_format = "roman"', "reading.number_format", "plain"),
        ("(?P<value>", "(?P<number>", "reading.pattern", "named group 'value'"),
        ("(?P<unit>nC) ", "(?P<unit>nC) [", "reading.pattern", "valid regular expression"),
        ('A = "ok"', 'A = "fine"', "reading.status.A", "ok, overrange"),
        ('mode = "query"', 'mode = "shout"', "profile.mode", "query, push"),
        ('"set_range"]', '"set_range", "teleport"]', "profile.capabilities", "identify"),
        ("min = -500, max = 500", "min = 500, max = -500", "validate.volts.max", "from 500"),
        ('template = "QZ"', "template = 7", "commands[1].template", "a string or a list"),
        ('parser = "ack"', 'parser = "guess"', "parser", "ack, reading, identity"),
    ],
)
def test_a_bad_value_is_refused_naming_field_value_and_allowed(tmp_path, old, new, field, allowed):
    assert old in QUERY_PLAIN
    path = tmp_path / "bad.toml"
    path.write_text(QUERY_PLAIN.replace(old, new, 1), encoding="utf-8")
    with pytest.raises(ProfileError) as refused:
        load_profile(path)
    message = str(refused.value)
    assert field in message and allowed in message and "bad.toml" in message


def test_a_declared_capability_needs_its_command(tmp_path):
    text = QUERY_PLAIN.replace('template = "ID?"', 'template = "ID?"\n', 1)
    text = text.replace('[[commands]]\nname = "identify"', '[[other]]\nname = "identify"', 1)
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(ProfileError, match="identify"):
        load_profile(path)


def test_push_capabilities_need_push_mode(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text(QUERY_PLAIN.replace('"set_range"]', '"set_range", "stream"]'), encoding="utf-8")
    with pytest.raises(ProfileError, match=r"profile\.mode"):
        load_profile(path)


def test_not_toml_at_all_is_refused(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text("[profile\nname = ", encoding="utf-8")
    with pytest.raises(ProfileError, match="valid TOML"):
        load_profile(path)


def test_commands_render_with_strict_validation_never_clamping():
    command = load_profile("query-engineering").command("set_bias")
    assert command.render(volts=-100) == ["HV -100.0"]
    for bad in (601, -600.5, "300", True, float("inf")):
        with pytest.raises(SettingOutOfRange) as refused:
            command.render(volts=bad)
        assert refused.value.field == "volts"
    with pytest.raises(SettingOutOfRange, match="required"):
        command.render()
