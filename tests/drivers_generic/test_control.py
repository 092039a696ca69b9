"""The control socket of a real `chargebook simulate` process: every op, and bad requests."""

from __future__ import annotations

import json
import socket

import pytest
from chargebook.drivers_generic.simulator.control import SimulatorControlError

from .conftest import FAST, start_simulator


@pytest.fixture(scope="module")
def shared_simulator():
    """One simulator for the tests that only send requests it must refuse."""
    running = start_simulator("--serial", *FAST)
    yield running
    assert running.stop() == 0


def test_every_op_answers_with_ok(simulator):
    sim = simulator("--serial", "--profile", "push-exponent", *FAST)
    control = sim.control
    started = control.beam(50, dose_rate_MU_per_min=300, wait=True)
    assert started["duration_s"] == pytest.approx(50 / 300 * 60 * 0.001)
    assert started["beam_on"] is False
    control.beam(10, wait=True)
    assert control.state()["total_MU"] == 60
    assert control.bias(-150)["bias_V"] == -150
    assert control.set_environment(temperature_C=23.0, pressure_kPa=99.0) == {
        "ok": True,
        "temperature_C": 23.0,
        "pressure_kPa": 99.0,
    }
    assert control.environment()["pressure_kPa"] == 99.0
    truth = control.truth(biases_V=[150, 50])
    assert set(truth["k_s_by_bias_V"]) >= {"300", "150", "50"}
    assert control.spike()["spike_pending"] is True
    assert control.state()["spike_pending"] is True
    assert control.drop(0.05)["seconds"] == 0.05
    state = control.state()
    assert state["profile"] == "push-exponent" and state["bias_V"] == -150


@pytest.mark.parametrize(
    ("op", "fields", "words"),
    [
        ("beam", {"mu": -5}, ["mu", "-5"]),
        ("beam", {"mu": 100, "dose_rate_MU_per_min": "fast"}, ["dose_rate_MU_per_min"]),
        ("bias", {"volts": "three hundred"}, ["volts"]),
        ("environment", {"temperature_C": 80}, ["temperature_C", "80"]),
        ("environment", {"pressure_kPa": 20}, ["pressure_kPa", "20"]),
        ("drop", {"seconds": -1}, ["seconds"]),
        ("flood", {"rate_per_s": 10, "count": 0}, ["count"]),
        ("truth", {"biases_V": ["x"]}, ["biases_V"]),
        ("teleport", {}, ["teleport", "beam"]),
    ],
)
def test_bad_requests_are_refused_with_the_field_named(shared_simulator, op, fields, words):
    sim = shared_simulator
    with pytest.raises(SimulatorControlError) as refused:
        sim.control.request(op, **fields)
    for word in words:
        assert word in str(refused.value)
    assert sim.control.state()["total_MU"] == 0  # nothing happened


def test_garbage_on_the_socket_gets_an_error_line_and_the_connection_stays_usable(simulator):
    sim = simulator("--serial", *FAST)
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as sock:
        sock.settimeout(10)
        sock.connect(sim.info["control"])
        reader = sock.makefile("rb")
        for garbage in (b"not json\n", b"[1, 2]\n", b"\xff\xfe\n", b'{"op": 5}\n'):
            sock.sendall(garbage)
            assert json.loads(reader.readline())["ok"] is False
        sock.sendall(b'{"op": "state"}\n')
        assert json.loads(reader.readline())["ok"] is True
        reader.close()


def test_a_beam_while_one_is_on_is_refused_and_wait_blocks_until_the_end(simulator):
    sim = simulator("--serial", "--time-scale", "0.01")
    sim.control.beam(100)  # 100 ms of wall time at this scale
    with pytest.raises(SimulatorControlError, match="already on"):
        sim.control.beam(100)
    ended = None
    while ended is None:
        try:
            ended = sim.control.beam(1, wait=True)
        except SimulatorControlError:
            continue
    assert ended["beam_on"] is False


def test_flood_pushes_the_requested_number_of_lines(simulator):
    from chargebook.drivers_generic import open_electrometer

    sim = simulator("--serial", "--profile", "push-exponent", *FAST)
    driver = open_electrometer("push-exponent", port=sim.serial)
    try:
        sim.control.flood(0, 500)
        received = 0
        while driver.next_sample(0.5) is not None:
            received += 1
    finally:
        driver.close()
    assert received == 500
