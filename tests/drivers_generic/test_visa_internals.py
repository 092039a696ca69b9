"""The pyvisa-py internals the VISA transport relies on, on real resources: fail loudly if a
pyvisa-py release changes them (visa_transport.PYVISA_PY_INTERNALS); the VISA library choice
and flow control on ASRL resources.

Resources are the simulated electrometer's loopback SCPI socket and its pseudo-terminal.
"""

from __future__ import annotations

import contextlib
import dataclasses
import select
import socket
import threading
import time
import warnings

import pytest
import serial
from chargebook.drivers_generic import build_electrometer, load_profile, open_electrometer
from chargebook.drivers_generic.interface import InstrumentDisconnected, ProtocolError
from chargebook.drivers_generic.visa_transport import (
    PYVISA_PY_INTERNALS,
    WRITE_TIMEOUT_MS,
    VisaTransport,
    pyvisa_py_interface,
    visa_library_spec,
)

from .conftest import FAST, scpi_driver


def _open_raw(resource: str):
    import pyvisa

    return pyvisa.ResourceManager("@py").open_resource(resource, open_timeout=2000)


def test_pyvisa_py_keeps_the_socket_of_a_tcpip_socket_resource_where_the_driver_looks(simulator):
    sim = simulator("--scpi", "0", *FAST)
    resource = _open_raw(sim.scpi)
    try:
        sessions = resource.visalib.sessions  # PYVISA_PY_INTERNALS[0]
        assert isinstance(sessions, dict), PYVISA_PY_INTERNALS
        interface = sessions[resource.session].interface  # PYVISA_PY_INTERNALS[1]
        assert isinstance(interface, socket.socket), PYVISA_PY_INTERNALS
        assert interface.getpeername()[1] == int(sim.scpi.split("::")[2])  # the simulator's
        assert pyvisa_py_interface(resource) is interface
        pending = sessions[resource.session]._pending_buffer  # PYVISA_PY_INTERNALS[2]
        assert isinstance(pending, bytearray), PYVISA_PY_INTERNALS
    finally:
        resource.close()
    driver = open_electrometer("scpi-generic", resource=sim.scpi)
    try:
        assert isinstance(driver.transport.interface, socket.socket)  # the path the driver uses
    finally:
        driver.close()


def test_pyvisa_py_keeps_the_serial_port_of_an_asrl_resource_where_the_driver_looks(simulator):
    sim = simulator("--serial", "--profile", "query-plain", *FAST)
    resource = _open_raw(f"ASRL{sim.serial}::INSTR")
    try:
        interface = resource.visalib.sessions[resource.session].interface
        assert isinstance(interface, serial.Serial), PYVISA_PY_INTERNALS
        assert interface.port == sim.serial
    finally:
        resource.close()


@pytest.mark.parametrize(
    ("flow_control", "xonxoff", "rtscts"),
    [("none", False, False), ("xonxoff", True, False), ("rtscts", False, True)],
)
def test_an_asrl_resource_gets_the_profiles_flow_control(simulator, flow_control, xonxoff, rtscts):
    sim = simulator("--serial", "--profile", "query-plain", *FAST)
    profile = load_profile("query-plain")
    settings = dataclasses.replace(profile.port, flow_control=flow_control)
    transport = VisaTransport(f"ASRL{sim.serial}::INSTR", profile.framing, settings=settings)
    transport.open()
    try:
        port = transport.interface
        assert (port.xonxoff, port.rtscts) == (xonxoff, rtscts)
        assert port.baudrate == profile.port.baud
    finally:
        transport.close()


def test_the_visa_library_is_the_option_else_pyvisa_library_else_at_py(simulator, monkeypatch):
    assert visa_library_spec(None, {}) == "@py"
    assert visa_library_spec(None, {"PYVISA_LIBRARY": "@ivi"}) == "@ivi"
    assert visa_library_spec("@py", {"PYVISA_LIBRARY": "@ivi"}) == "@py"
    sim = simulator("--scpi", "0", *FAST)
    monkeypatch.setenv("PYVISA_LIBRARY", "@nosuchbackend")
    with pytest.raises(InstrumentDisconnected, match="nosuchbackend"):
        open_electrometer("scpi-generic", resource=sim.scpi)  # the variable is honoured
    driver = open_electrometer("scpi-generic", resource=sim.scpi, visa_library="@py")
    try:
        assert driver.identify().model == "SIM-SCPI"  # the option wins over the variable
    finally:
        driver.close()


def test_a_command_after_a_look_for_waiting_lines_gets_a_writers_timeout(simulator):
    """VISA has one timeout for reads and writes: a read that only looks for waiting lines sets
    it to 1 ms, and a command written under it failed on a busy machine (a failed write counts
    as the instrument gone)."""
    sim = simulator("--serial", "--profile", "query-plain", *FAST)
    profile = load_profile("query-plain")
    transport = VisaTransport(f"ASRL{sim.serial}::INSTR", profile.framing, settings=profile.port)
    transport.open()
    try:
        assert transport.read_line(0.0) is None  # nothing waiting: a 1 ms look
        transport.write_line("ID?")
        assert transport.interface.write_timeout >= WRITE_TIMEOUT_MS / 1000
        assert transport.read_line(2.0) is not None  # and the command went through
    finally:
        transport.close()


def test_writes_to_a_peer_gone_end_in_a_disconnection(simulator):
    with scpi_driver(simulator) as (sim, driver):
        driver.identify()
        sim.control.drop(2.0)  # the simulator closes the socket (it listens again after 2 s)
        with pytest.raises(InstrumentDisconnected, match="went away"):
            for _ in range(200):  # the first sends may still land in the socket's buffer
                driver.transport.write_line("*IDN?")
                time.sleep(0.005)
        assert not driver.transport.is_open


def _serve_once(
    reply: bytes, *, then_close: bool = False
) -> tuple[socket.socket, threading.Thread]:
    """Listen on a loopback port; send ``reply`` to the first client once it has sent a line,
    then close the connection (``then_close``) or hold it open until the client closes it."""
    server = socket.create_server(("127.0.0.1", 0))

    def serve() -> None:
        connection, _ = server.accept()
        with connection:
            connection.recv(64)
            connection.sendall(reply)
            if not then_close:
                connection.recv(64)

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    return server, thread


def test_an_answer_longer_than_a_visa_chunk_is_read_whole_and_silently():
    """Reads ask VISA for one chunk at a time (viRead); an answer longer than a chunk is read
    on, chunk after chunk, with no VisaIOWarning for a chunk read whole (as read_raw has none),
    and framed as the profile says: an over-long line is refused, the next line still read."""
    profile = load_profile("scpi-generic")
    over_long = b"9" * 50_000  # longer than pyvisa's chunk of 20 KiB: several reads
    server, thread = _serve_once(over_long + b"\n+1.5E-09\n")
    transport = VisaTransport(
        f"TCPIP::127.0.0.1::{server.getsockname()[1]}::SOCKET", profile.framing
    )
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # a VisaIOWarning fails the test
            transport.open()
            transport.write_line("FETC?")
            with pytest.raises(ProtocolError, match="longer than 256 bytes") as refused:
                transport.read_line(5.0)
            assert refused.value.line == over_long[:256]
            assert transport.read_line(5.0).raw == b"+1.5E-09"
    finally:
        transport.close()
        server.close()
        thread.join(5.0)


def test_a_last_answer_before_the_far_end_closes_is_read_then_the_close_is_seen():
    """The look for a closed peer before each read (poll, then a peek only when poll reports a
    close) must neither lose an answer sent just before the close nor miss the close: a read
    that waited for pyvisa-py's own timeout instead would outlast this test's time limit."""
    profile = load_profile("scpi-generic")
    server, thread = _serve_once(b"+1.5E-09\n", then_close=True)
    transport = VisaTransport(
        f"TCPIP::127.0.0.1::{server.getsockname()[1]}::SOCKET", profile.framing
    )
    try:
        transport.open()
        transport.write_line("FETC?")
        thread.join(5.0)  # the answer sent and the connection closed
        assert transport.read_line(1000.0).raw == b"+1.5E-09"
        with pytest.raises(InstrumentDisconnected, match="closed the connection"):
            transport.read_line(1000.0)
        assert not transport.is_open
    finally:
        transport.close()
        server.close()


class LateFetch(threading.Thread):
    """An SCPI instrument on a loopback socket: the n-th "FETC?" is answered ``answers(n)``
    (bytes, one or more lines) after ``delay_s(n)``; ``answered`` counts the answers sent and
    ``sent`` is set after each."""

    def __init__(self, answers, delay_s) -> None:
        super().__init__(daemon=True)
        self.server = socket.create_server(("127.0.0.1", 0))
        self.resource = f"TCPIP::127.0.0.1::{self.server.getsockname()[1]}::SOCKET"
        self.answers, self.delay_s = answers, delay_s
        self.answered, self.sent = 0, threading.Condition()

    def run(self) -> None:
        connection, _ = self.server.accept()
        buffer = b""
        with connection, contextlib.suppress(OSError):
            while data := connection.recv(1024):
                buffer += data
                while b"\n" in buffer:
                    _, buffer = buffer.split(b"\n", 1)
                    time.sleep(self.delay_s(self.answered + 1))
                    connection.sendall(self.answers(self.answered + 1))
                    with self.sent:
                        self.answered += 1
                        self.sent.notify_all()

    def wait_answered(self, count: int) -> None:
        with self.sent:
            assert self.sent.wait_for(lambda: self.answered >= count, timeout=10.0)


def _scpi_driver(resource: str, timeout_s: float):
    profile = load_profile("scpi-generic")
    profile = dataclasses.replace(
        profile, timing=dataclasses.replace(profile.timing, timeout_s=timeout_s)
    )
    driver = build_electrometer(profile, resource=resource)
    driver.open()
    return driver


def test_a_late_answer_waiting_in_the_socket_is_not_taken_for_the_next_reading():
    """Over VISA as over a serial port: the 2nd query's answer comes late, the resent query's
    answer (3) then waits in the socket; the next query must not take it for its own."""
    delays_s = {2: 0.8, 3: 0.05}  # 3 apart from 2: in the socket, not inside pyvisa-py
    instrument = LateFetch(lambda n: f"+{n}.0E-09\n".encode(), lambda n: delays_s.get(n, 0.0))
    instrument.start()
    driver = _scpi_driver(instrument.resource, timeout_s=0.5)
    try:
        assert driver.read_charge().charge_nC == 1.0
        assert driver.read_charge().charge_nC == 2.0  # resent after 0.5 s; the late answer
        instrument.wait_answered(3)  # the resent query's answer is sent; wait until it lands
        assert select.select([driver.transport.interface], [], [], 10.0)[0]
        assert driver.read_charge().charge_nC == 4.0  # not 3.0, one query behind
        assert driver.read_charge().charge_nC == 5.0
        assert driver.late_replies == 1
        assert "1 late answer(s)" in driver.reply_note
    finally:
        driver.close()
        instrument.server.close()


def test_a_stray_line_held_inside_pyvisa_py_is_not_taken_for_the_next_reading():
    """Two lines in one packet: pyvisa-py returns the first and keeps the second in a buffer
    of its own, out of the socket's sight; the next query must still set it aside."""
    instrument = LateFetch(
        lambda n: b"+1.0E-09\n+99.0E-09\n" if n == 1 else f"+{n}.0E-09\n".encode(), lambda n: 0.0
    )
    instrument.start()
    driver = _scpi_driver(instrument.resource, timeout_s=2.0)
    try:
        assert driver.read_charge().charge_nC == 1.0
        assert driver.read_charge().charge_nC == 2.0  # not the stray 99
        assert driver.late_replies == 1
    finally:
        driver.close()
        instrument.server.close()
