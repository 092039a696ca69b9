"""Framing in the transport base, over a scripted wire and over a real pseudo-terminal."""

from __future__ import annotations

import contextlib
import os
import threading
import time
import tty

import pytest
from chargebook.drivers_generic.interface import InstrumentDisconnected, ProtocolError
from chargebook.drivers_generic.profile import Framing, PortSettings
from chargebook.drivers_generic.serial_transport import SerialTransport
from chargebook.drivers_generic.transport import ScriptedTransport

CRLF = Framing(write_terminator=b"\r\n", read_terminator=b"\r\n", max_line_bytes=16)


def opened(pairs, **kwargs) -> ScriptedTransport:
    transport = ScriptedTransport(CRLF, pairs, **kwargs)
    transport.open()
    return transport


def test_lines_split_across_chunks_and_several_per_chunk():
    transport = opened([(None, b"ONE\r"), (None, b"\nTWO\r\nTHR"), (None, b"EE\r\n")])
    lines = [transport.read_line(0.0) for _ in range(4)]
    assert [line.raw if line else None for line in lines] == [b"ONE", b"TWO", b"THREE", None]


def test_an_over_long_line_is_refused_and_the_next_line_still_read():
    transport = opened([(None, b"X" * 40), (None, b"YYYY\r\nOK\r\n")])
    with pytest.raises(ProtocolError, match="longer than 16 bytes") as refused:
        transport.read_line(0.0)
    assert refused.value.line == b"X" * 16
    assert transport.read_line(0.0).raw == b"OK"  # the rest of the long line was skipped


def test_an_over_long_line_with_its_terminator_is_refused_too():
    transport = opened([(None, b"Z" * 20 + b"\r\nOK\r\n")])
    with pytest.raises(ProtocolError):
        transport.read_line(0.0)
    assert transport.read_line(0.0).raw == b"OK"


def test_every_line_is_reported_to_the_traffic_listener_with_its_terminator():
    seen = []
    ticks = iter([1.0, 2.0, 3.0])
    transport = opened(
        [("PING", "PONG")],
        traffic=lambda d, t, raw: seen.append((d.value, t, raw)),
        clock=ticks.__next__,
    )
    transport.write_line("PING")
    received = transport.read_line(0.0)
    assert seen == [("tx", 1.0, b"PING\r\n"), ("rx", 2.0, b"PONG\r\n")]
    assert received.t_s == 2.0


def test_a_command_framed_once_is_recorded_with_its_own_time_each_time_it_is_sent():
    seen = []
    ticks = iter([1.0, 2.0, 3.0, 4.0])
    transport = opened(
        [("FETC?", "+1"), ("FETC?", "+2")],
        traffic=lambda d, t, raw: seen.append((d.value, t, raw)),
        clock=ticks.__next__,
    )
    frame = transport.frame("FETC?")
    assert frame == b"FETC?\r\n"
    answers = []
    for _ in range(2):
        transport.send(frame)
        answers.append(transport.read_line(0.0))
    assert [(line.t_s, line.raw) for line in answers] == [(2.0, b"+1"), (4.0, b"+2")]
    assert seen == [
        ("tx", 1.0, b"FETC?\r\n"),
        ("rx", 2.0, b"+1\r\n"),
        ("tx", 3.0, b"FETC?\r\n"),
        ("rx", 4.0, b"+2\r\n"),
    ]


def test_a_closed_transport_refuses_to_write_or_read():
    transport = ScriptedTransport(CRLF, [])
    with pytest.raises(InstrumentDisconnected):
        transport.write_line("X")
    with pytest.raises(InstrumentDisconnected):
        transport.read_line(0.0)


@pytest.fixture
def pty_pair():
    master, slave = os.openpty()
    tty.setraw(slave)
    name = os.ttyname(slave)
    yield master, name
    for fd in (master, slave):
        with contextlib.suppress(OSError):
            os.close(fd)


def test_serial_transport_on_a_real_pty_reads_writes_and_sees_the_port_vanish(pty_pair):
    master, name = pty_pair
    transport = SerialTransport(name, PortSettings(baud=115200), CRLF)
    transport.open()
    transport.write_line("HELLO")
    assert os.read(master, 100) == b"HELLO\r\n"
    os.write(master, b"WORLD\r\n")
    assert transport.read_line(2.0).raw == b"WORLD"
    assert transport.read_line(0.05) is None  # a timeout, not an error
    os.close(master)
    with pytest.raises(InstrumentDisconnected):
        transport.read_line(2.0)
        transport.write_line("ANYONE?")
    assert not transport.is_open


def test_serial_transport_open_of_a_missing_port_is_instrument_disconnected(tmp_path):
    transport = SerialTransport(str(tmp_path / "ttyGone"), PortSettings(), CRLF)
    with pytest.raises(InstrumentDisconnected, match="ttyGone"):
        transport.open()


def test_a_longest_line_whose_terminator_comes_in_two_reads_is_read_whole(pty_pair):
    # A line of exactly max_line_bytes (16 here) whose CR arrives before its LF is not
    # over-long: it is read, and the line after it too.
    master, name = pty_pair
    transport = SerialTransport(name, PortSettings(baud=115200), CRLF)
    transport.open()
    os.write(master, b"A" * 16 + b"\r")
    assert transport.read_line(0.2) is None  # the line's end has not come yet
    os.write(master, b"\nOK\r\n")
    assert transport.read_line(2.0).raw == b"A" * 16
    assert transport.read_line(2.0).raw == b"OK"
    transport.close()


def _read_in_thread(read) -> tuple[threading.Thread, list]:
    """Start ``read()`` in a thread of its own; return the thread and where its result goes."""
    result: list = []
    thread = threading.Thread(target=lambda: result.append(read()), daemon=True)
    thread.start()
    return thread, result


def test_a_wake_ends_a_wait_for_pushed_lines_and_loses_no_line(pty_pair):
    # The daemon's instrument thread waits for pushed lines; a command queued meanwhile must
    # go out now, not after the next line (the re-arm of a reading, issue 17 target 1).
    master, name = pty_pair
    transport = SerialTransport(name, PortSettings(baud=115200), CRLF)
    transport.open()
    thread, result = _read_in_thread(lambda: transport.read_burst(60.0, wakeable=True))
    time.sleep(0.1)  # the reader is in its wait (if not, the wake is taken at its start)
    transport.wake()
    thread.join(30.0)  # a deadline for a hung test, not a timing check: the wait was 60 s
    assert not thread.is_alive() and result == [None]
    os.write(master, b"S 1\r\nS 2\r\n")  # lines after a wake are all still read
    burst = transport.read_burst(5.0, wakeable=True)
    assert burst is not None and burst.count == 2
    transport.close()


def test_a_wake_does_not_end_a_wait_for_a_commands_answer(pty_pair):
    # A command's answer is always waited for: a wake then would read as a timeout.
    master, name = pty_pair
    transport = SerialTransport(name, PortSettings(baud=115200), CRLF)
    transport.open()
    thread, result = _read_in_thread(lambda: transport.read_line(60.0))
    time.sleep(0.1)
    transport.wake()
    time.sleep(0.2)
    assert thread.is_alive()  # still waiting for its answer
    os.write(master, b"ACK GO\r\n")
    thread.join(30.0)
    assert result[0].raw == b"ACK GO"
    transport.close()
    transport.wake()  # a wake after close is harmless
