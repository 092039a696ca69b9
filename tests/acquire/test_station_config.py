"""The station file read into `serve`'s options, and the service manager's notify address."""

from __future__ import annotations

import argparse
import os

import pytest
from chargebook.acquire.daemon import sd_notify
from chargebook.acquire.daemon.station_config import ConfigError, apply_config, read_config


def _args(**given) -> argparse.Namespace:
    fields = ("profile", "port", "resource", "plan", "db", "thresholds", "socket")
    return argparse.Namespace(**{name: None for name in fields} | {"socket_group": None} | given)


def test_a_key_of_the_wrong_type_and_a_port_beside_a_resource_are_refused(tmp_path):
    path = tmp_path / "station.toml"
    path.write_text("plan = 3\n")
    with pytest.raises(ConfigError, match="plan = 3 has the wrong type"):
        read_config(path)
    path.write_text('port = "/dev/ttyUSB0"\nresource = "ASRL1::INSTR"\n')
    with pytest.raises(ConfigError, match=r"resource .* is given beside port"):
        read_config(path)
    path.write_text("profile = \n")
    with pytest.raises(ConfigError, match="is not TOML"):
        read_config(path)


def test_the_command_line_overrides_the_file_and_its_choice_of_electrometer():
    data = {"profile": "query-plain", "port": "/dev/serial/by-id/usb-x", "database": "/s.sqlite"}
    args = _args(profile="push-exponent", resource="ASRL/dev/ttyS0::INSTR")
    apply_config(args, data)
    assert (args.profile, args.resource, args.port) == (
        "push-exponent",
        "ASRL/dev/ttyS0::INSTR",
        None,
    )
    assert args.db == "/s.sqlite"  # a key the command line left alone
    # A known key whose option this command lacks is refused by name, never silently dropped.
    with pytest.raises(ConfigError, match=r"station_name .* is not read by this version"):
        apply_config(_args(), {"station_name": "A"})


def test_the_notify_address_and_the_watchdog_interval_come_from_the_environment():
    assert sd_notify.notify_address({}) is None
    assert sd_notify.notify_address({"NOTIFY_SOCKET": "/run/systemd/notify"}) == (
        "/run/systemd/notify"
    )
    assert sd_notify.notify_address({"NOTIFY_SOCKET": "@abc"}) == b"\0abc"  # abstract
    assert sd_notify.watchdog_interval_s({"WATCHDOG_USEC": "30000000"}) == 15.0  # half
    assert sd_notify.watchdog_interval_s({"WATCHDOG_USEC": "0"}) is None
    assert sd_notify.watchdog_interval_s({"WATCHDOG_USEC": "x"}) is None
    other = {"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": str(os.getpid() + 1)}
    assert sd_notify.watchdog_interval_s(other) is None  # meant for another process
    assert sd_notify.notify("READY=1", {}) is False  # not under a manager: nothing sent
