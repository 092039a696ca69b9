"""The shipped service files: the systemd unit (checked by systemd's own verifier) and the
example station file (read by the daemon's own reader)."""

from __future__ import annotations

import configparser
import subprocess
import sys
from pathlib import Path

from chargebook.acquire.daemon.station_config import read_config

CONTRIB = Path(__file__).parents[1] / "contrib"


def _unit() -> configparser.ConfigParser:
    unit = configparser.ConfigParser(strict=False, interpolation=None)
    unit.optionxform = str  # systemd keys are case-sensitive
    unit.read(CONTRIB / "chargebook.service")
    return unit


def test_the_unit_is_a_hardened_notify_service_that_holds_no_options():
    service = _unit()["Service"]
    assert service["Type"] == "notify" and int(service["WatchdogSec"]) > 0
    assert service["ExecStart"].endswith("/chargebook serve")  # everything else: station.toml
    assert service["User"] == "chargebook" and service["SupplementaryGroups"] == "dialout"
    assert service["RuntimeDirectory"] == service["StateDirectory"] == "chargebook"
    assert service["ProtectSystem"] == "strict"
    assert service["PrivateTmp"] == service["NoNewPrivileges"] == "yes"
    assert service["RestrictAddressFamilies"] == "AF_UNIX"  # no network unless TCPIP is used


def test_systemd_accepts_every_line_of_the_unit(tmp_path):
    # The verifier needs the program to exist: the unit is checked with this install's path.
    text = (CONTRIB / "chargebook.service").read_text()
    program = Path(sys.executable).parent / "chargebook"
    copy = tmp_path / "chargebook.service"
    copy.write_text(text.replace("/opt/chargebook/venv/bin/chargebook", str(program)))
    done = subprocess.run(
        ["systemd-analyze", "verify", str(copy)], capture_output=True, text=True, timeout=60
    )
    assert done.returncode == 0, done.stderr
    assert "chargebook.service" not in done.stderr, done.stderr  # no unknown or bad key


def test_the_example_station_file_is_read_and_matches_the_unit():
    data = read_config(CONTRIB / "station.toml")
    service = _unit()["Service"]
    assert data["socket"] == f"/run/{service['RuntimeDirectory']}/daemon.sock"
    assert data["database"].startswith(f"/var/lib/{service['StateDirectory']}/")
    assert data["socket_group"] == service["Group"]  # the runtime directory is 0750 for it
    assert service["RuntimeDirectoryMode"] == "0750"
    assert data["port"].startswith("/dev/serial/by-id/")
    assert data["station_name"]
