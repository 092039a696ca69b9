"""`chargebook ports` and discovery: serial ports and local VISA resources, never the network."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
from chargebook.drivers_generic.discovery import VISA_QUERIES, serial_ports, visa_resources


def test_visa_listing_never_asks_the_network_interfaces(monkeypatch):
    # Network discovery cannot run here (and must never run): make it fail loudly if called.
    import pyvisa_py.highlevel  # noqa: F401  (registers the session classes)
    from pyvisa_py import tcpip

    def forbidden(*args, **kwargs):
        raise AssertionError("TCPIP/HiSLIP discovery was attempted")

    for name in ("TCPIPInstrVxi11", "TCPIPInstrHiSLIP", "TCPIPSocketSession", "TCPIPInstr"):
        if hasattr(tcpip, name):
            monkeypatch.setattr(getattr(tcpip, name), "list_resources", staticmethod(forbidden))
    found, problems = visa_resources()
    assert all(port.name.startswith(("ASRL", "USB")) for port in found)
    assert all("discovery" not in problem for problem in problems)


def test_only_local_patterns_may_be_asked_for():
    assert VISA_QUERIES == ("ASRL?*::INSTR", "USB?*::INSTR")
    with pytest.raises(ValueError, match="TCPIP"):
        visa_resources(("TCPIP?*::INSTR",))


def test_serial_ports_are_listed_by_device_name():
    ports = serial_ports()
    assert [port.name for port in ports] == sorted(port.name for port in ports)
    assert all(port.kind == "serial" for port in ports)


def test_the_ports_command_prints_json_with_both_lists():
    result = subprocess.run(
        [sys.executable, "-m", "chargebook", "ports", "--json"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert result.returncode == 0, result.stderr
    document = json.loads(result.stdout)
    assert set(document) == {"serial", "visa", "problems"}
    assert all(item["name"].startswith(("ASRL", "USB")) for item in document["visa"])
    assert "hislip" not in result.stderr.lower()  # pyvisa-py warns when it tries HiSLIP discovery
