"""Finding instruments: serial ports and local VISA resources, never the network.

Serial ports come from pyserial's ``list_ports.comports()``. VISA resources come from pyvisa's
pure-Python backend, asked only for ``ASRL?*::INSTR`` and ``USB?*::INSTR``: TCPIP and HiSLIP
discovery broadcast on the network and are never run.
"""

from __future__ import annotations

import logging
from dataclasses import asdict, dataclass

log = logging.getLogger("chargebook.drivers_generic.discovery")

#: The only VISA resource patterns chargebook ever lists.
VISA_QUERIES = ("ASRL?*::INSTR", "USB?*::INSTR")


@dataclass(frozen=True, slots=True)
class FoundPort:
    """One port or resource found: ``kind`` is "serial" or "visa"; ``name`` is what to open."""

    kind: str
    name: str
    description: str = ""
    hardware_id: str = ""

    def to_dict(self) -> dict[str, str]:
        """Return the port as plain data."""
        return asdict(self)


def serial_ports() -> list[FoundPort]:
    """Return the serial ports pyserial finds, sorted by device name."""
    from serial.tools import list_ports

    found = [
        FoundPort("serial", port.device, port.description or "", port.hwid or "")
        for port in list_ports.comports()
    ]
    return sorted(found, key=lambda port: port.name)


def visa_resources(queries: tuple[str, ...] = VISA_QUERIES) -> tuple[list[FoundPort], list[str]]:
    """Return (resources found, problems) for the local VISA patterns only.

    pyvisa-py's ``ResourceManager.list_resources(query)`` asks *every* interface for its
    resources before filtering by the query, which includes VXI-11 broadcasts and mDNS. So the
    ASRL and USB session classes are asked directly, and no other.
    """
    if any(not query.upper().startswith(("ASRL", "USB")) for query in queries):
        raise ValueError(f"queries = {queries!r} is not allowed; allowed: ASRL and USB patterns")
    try:
        import pyvisa_py.highlevel  # noqa: F401  (registers the session classes)
        from pyvisa import constants, rname
        from pyvisa_py.sessions import Session
    except Exception as error:  # no backend at all: report, do not fail the listing
        return [], [f"VISA (@py) unavailable: {error}"]
    local = {constants.InterfaceType.asrl, constants.InterfaceType.usb}
    names: list[str] = []
    problems = [
        f"{interface.name} {resource_class}: {issue.strip().splitlines()[0]}"
        for (interface, resource_class), issue in Session.iter_session_classes_issues()
        if interface in local
    ]
    for (interface, resource_class), session_class in Session.iter_valid_session_classes():
        if interface not in local:
            continue
        try:
            names.extend(session_class.list_resources())
        except Exception as error:  # one interface failing (no USB library) is not fatal
            problems.append(f"{interface.name} {resource_class}: {error}")
    found = {name for query in queries for name in rname.filter(names, query)}
    return [FoundPort("visa", name, "VISA (@py)") for name in sorted(found)], problems
