"""Playback: a recorded session's traffic, played back by the simulator, reads back exactly."""

from __future__ import annotations

import subprocess
import sys
import threading
import time

import pytest
from chargebook.drivers_generic import load_profile, open_electrometer
from chargebook.drivers_generic.interface import InstrumentReportedError
from chargebook.drivers_generic.readout import capture_reading
from chargebook.drivers_generic.simulator.playback import (
    MAX_LOG_LINE_BYTES,
    PlaybackLogError,
    PlaybackResponder,
    TrafficRecorder,
    parse_log,
    read_log,
)

from .conftest import FAST, capture


def record_session(sim, profile_name: str, readings: int) -> tuple[list[float], TrafficRecorder]:
    profile = load_profile(profile_name)
    framing = profile.framing
    recorder = TrafficRecorder(framing.read_terminator, framing.write_terminator, framing.encoding)
    driver = open_electrometer(profile_name, port=sim.serial, traffic=recorder)
    try:
        charges = [capture(driver, sim.control).charge_nC for _ in range(readings)]
    finally:
        driver.close()
    return charges, recorder


def replay_session(sim, profile_name: str, readings: int) -> list[float]:
    driver = open_electrometer(profile_name, port=sim.serial)
    try:
        # the log holds the beam: nothing to deliver, the recorded lines say it all
        return [capture_reading(driver, lambda wait: None).charge_nC for _ in range(readings)]
    finally:
        driver.close()


@pytest.mark.parametrize("profile", ["query-plain", "push-exponent"])
def test_a_recorded_session_plays_back_to_the_same_readings(simulator, tmp_path, profile):
    live = simulator("--serial", "--profile", profile, "--seed", "21", *FAST)
    recorded, recorder = record_session(live, profile, readings=3)
    log = recorder.write(tmp_path / "traffic.jsonl")

    played = simulator("--serial", "--profile", profile, "--playback", str(log), "--speed", "0")
    assert replay_session(played, profile, readings=3) == recorded
    assert played.control.state()["playback"] == str(log)
    with pytest.raises(Exception, match="playback"):
        played.control.beam(100)


def test_push_mode_keeps_the_recorded_spacing_scaled_by_speed():
    entries = [(10.0, "tx", "GO"), (10.0, "rx", "ACK GO"), (12.0, "rx", "S t=2.000 q=+1E-9 C OK")]
    now = [0.0]
    responder = PlaybackResponder(entries, "push", speed=4.0, clock=lambda: now[0])
    assert responder.tick() == []  # waits at the gate for the driver's command
    assert responder.respond("GO") == []
    assert responder.tick() == ["ACK GO"]
    now[0] = 0.49  # 2 s recorded / speed 4 = 0.5 s
    assert responder.tick() == []
    now[0] = 0.5
    assert responder.tick() == ["S t=2.000 q=+1E-9 C OK"]
    assert responder.finished


def test_query_mode_answers_each_command_with_the_recorded_reply():
    entries = [(0.0, "tx", "Q?"), (0.1, "rx", "Q +1.0000 nC A"), (5.0, "tx", "Q?")]
    entries.append((5.1, "rx", "Q +2.0000 nC A"))
    responder = PlaybackResponder(entries, "query", speed=1.0)
    assert responder.respond("Q?") == ["Q +1.0000 nC A"]
    assert responder.respond("QZ") == ["Q +2.0000 nC A"]  # a changed plan is still answered
    assert responder.respond("Q?") == []


@pytest.mark.parametrize(
    ("line", "words"),
    [
        ("not json", ["line 1", "JSON"]),
        ('{"t_s": "soon", "dir": "rx", "line": "x"}', ["t_s", "soon"]),
        ('{"t_s": 1, "dir": "sideways", "line": "x"}', ["dir", "sideways", "rx, tx"]),
        ('{"t_s": 1, "dir": "rx", "line": 5}', ["line = 5"]),
    ],
)
def test_a_bad_log_line_is_refused_naming_the_line_and_field(line, words):
    with pytest.raises(PlaybackLogError) as refused:
        parse_log([line], "session.jsonl")
    for word in words:
        assert word in str(refused.value)


def test_simulate_refuses_a_bad_playback_log_with_exit_status_2(tmp_path):
    log = tmp_path / "bad.jsonl"
    log.write_text('{"t_s": 0, "dir": "rx", "line": "ok"}\n{"t_s": 1}\n', encoding="utf-8")
    result = subprocess.run(
        [
            sys.executable,
            "-m",
            "chargebook.acquire.commands.cli",
            "simulate",
            "--playback",
            str(log),
        ],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert result.returncode == 2
    assert "line 2" in result.stderr and "dir" in result.stderr
    assert result.stdout == ""


def test_a_push_playback_at_speed_0_delivers_every_byte_to_a_slow_reader(tmp_path):
    # At --speed 0 every recorded line is due at once: the pty fills long before the reader
    # looks. Lines used to be written with no wait, so a full port delivered a cut line.
    import os
    import time

    from chargebook.drivers_generic.simulator.serial_server import PtyServer

    framing = load_profile("push-exponent").framing
    lines = [f"S t={i / 1000:.3f} q=+{i}E-12 C OK" for i in range(5000)]
    entries = [(i / 1000, "rx", line) for i, line in enumerate(lines)]
    server = PtyServer(PlaybackResponder(entries, "push", speed=0), framing, tmp_path / "pty")
    server.start()
    try:
        port = os.open(tmp_path / "pty", os.O_RDONLY | os.O_NOCTTY)
        os.set_blocking(port, False)
        time.sleep(0.5)  # a slow reader: the pty's buffer fills meanwhile
        received = bytearray()
        expected = sum(len(line) + len(framing.read_terminator) for line in lines)
        deadline = time.monotonic() + 30
        while len(received) < expected and time.monotonic() < deadline:
            try:
                received += os.read(port, 65536)
            except BlockingIOError:
                time.sleep(0.01)
        os.close(port)
    finally:
        server.stop()
    got = bytes(received).decode().split(framing.read_terminator.decode())
    assert got[:-1] == lines and got[-1] == ""


def test_a_log_line_over_the_bound_is_refused_naming_it_without_reading_it_whole(tmp_path):
    path = tmp_path / "session.jsonl"
    good = '{"t_s": 1.0, "dir": "tx", "line": "Q?"}\n'
    with path.open("w") as log:
        log.write(good)
        log.write('{"t_s": 2.0, "dir": "rx", "line": "' + "9" * (3 * MAX_LOG_LINE_BYTES) + '"}\n')
        log.write(good)
    with pytest.raises(PlaybackLogError) as refused:
        read_log(path)
    message = str(refused.value)
    assert f"{path} line 2: longer than 1,048,576 bytes" in message


def test_a_log_line_just_within_the_bound_is_read(tmp_path):
    path = tmp_path / "session.jsonl"
    head, tail = '{"t_s": 1.0, "dir": "rx", "line": "', '"}\n'
    body = "9" * (MAX_LOG_LINE_BYTES - len(head) - len(tail))
    path.write_text(head + body + tail)
    assert read_log(path) == [(1.0, "rx", body)]


@pytest.mark.parametrize(("speed", "in_turn"), [(0.0, True), (1e6, False)])
def test_a_playback_port_in_this_process_answers_the_real_driver_over_a_real_pty(speed, in_turn):
    # Query mode at speed 0: each command is answered in the caller's own thread as it is
    # written (no serving thread); at a recorded pace a thread serves the pty. Either way the
    # driver writes to a real pty and parses the recorded answer's bytes from it.
    from chargebook.drivers_generic.driver import ProfileElectrometer
    from chargebook.drivers_generic.simulator.playback import playback_port

    profile = load_profile("query-plain")
    seen: list[tuple[str, bytes]] = []
    entries = [(0.0, "tx", "Q?"), (0.1, "rx", "Q +1.2500 nC A"), (0.2, "tx", "Q?")]
    entries.append((0.3, "rx", "Q -0.5000 nC A"))
    threads_before = threading.active_count()
    with playback_port(entries, profile.framing, profile.mode, speed) as port:
        assert (port.answer is not None) == in_turn
        assert (threading.active_count() == threads_before) == in_turn
        assert port.path.resolve().is_char_device()  # a real terminal device
        traffic = lambda direction, t_s, raw: seen.append((direction.value, bytes(raw)))  # noqa: E731
        driver = ProfileElectrometer(profile, port.transport(profile, traffic, time.monotonic))
        driver.open()
        try:
            charges = [driver.read_charge().charge_nC for _ in range(2)]
        finally:
            driver.close()
    assert charges == [1.25, -0.5]
    assert [line for _, line in seen] == [
        b"Q?\r\n",
        b"Q +1.2500 nC A\r\n",
        b"Q?\r\n",
        b"Q -0.5000 nC A\r\n",
    ]


class _Writes:
    """A traffic listener that notes each line and, told lines in one call, the call too."""

    def __init__(self) -> None:
        self.lines: list[tuple[str, bytes]] = []
        self.calls: list[tuple[str, int]] = []

    def __call__(self, direction, t_s: float, raw: bytes) -> None:
        self.lines.append((direction.value, bytes(raw)))

    def burst(self, direction, t_s: float, lines) -> None:
        self.calls.append((direction.value, len(lines)))
        self.lines += [(direction.value, bytes(raw)) for raw in lines]


@pytest.mark.parametrize("speed", [0.0, 1e6])
def test_polls_kept_in_flight_are_sent_in_one_write_and_read_in_one_pass_over_a_real_pty(speed):
    # The replay at speed 0 keeps a recording's run of polls in flight: the real driver writes
    # the k queries at once to a real pty, the playback answers them all, and the driver
    # parses the k answers' bytes as one burst. Same readings as polling one at a time.
    from chargebook.drivers_generic.driver import ProfileElectrometer
    from chargebook.drivers_generic.simulator.playback import playback_port

    profile = load_profile("query-plain")
    charges = [0.0, 0.098, -1.5, 20.1234, 20.1234, 0.0001]
    entries = []
    for number, charge in enumerate(charges):
        entries += [(number * 0.05, "tx", "Q?"), (number * 0.05, "rx", f"Q {charge:+.4f} nC A")]
    entries += [(1.0, "tx", "Q?"), (1.0, "rx", "Q +7.0000 nC O")]  # overrange: line by line
    entries += [(1.1, "tx", "Q?"), (1.1, "rx", "ERR 3")]  # a refusal where a reading was due
    writes = _Writes()
    with playback_port(entries, profile.framing, profile.mode, speed) as port:
        driver = ProfileElectrometer(profile, port.transport(profile, writes, time.monotonic))
        driver.open()
        try:
            read = driver.read_charges(len(charges))
            (overrange,) = driver.read_charges(1)
            with pytest.raises(InstrumentReportedError, match="error 3"):
                driver.read_charges(2)  # the second query is never answered: the first refused
        finally:
            driver.close()
    assert [sample.charge_nC for sample in read] == charges  # parse_reading's own values
    assert [sample.status.value for sample in read] == ["ok"] * len(charges)
    assert overrange.status.value == "overrange" and overrange.charge_nC == 7.0
    assert writes.calls[0] == ("tx", len(charges))  # the queries in one write
    received = sum(count for direction, count in writes.calls if direction == "rx")
    assert received >= len(charges)  # the answers read a burst at a time, not line by line
    assert writes.lines[: len(charges)] == [("tx", b"Q?\r\n")] * len(charges)
