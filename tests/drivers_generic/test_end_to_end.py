"""Each driver end to end against `chargebook simulate`: a real pty, a real loopback socket.

The expected charge comes from the simulator's own `truth` op, through the definitions of the
factors (TRS-398: M_corrected = M · k_TP · k_pol · k_s recovers the charge at reference
conditions, full collection, both polarities averaged), so the check is independent of how the
simulator computes it.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from chargebook.drivers_generic import (
    build_electrometer,
    load_profile,
    open_electrometer,
    reconnect,
)
from chargebook.drivers_generic.interface import (
    InstrumentDisconnected,
    InstrumentReportedError,
    InstrumentTimeout,
    ProtocolError,
    ReadingStatus,
    SettingOutOfRange,
)

from .conftest import FAST, MU, capture, scpi_driver

#: Simulated noise is 0.03 % per delivery; 0.15 % is five standard deviations.
NOISE_BOUND = 0.0015


def expected_charge_nC(truth: dict, mu: float = MU) -> float:
    """Return the charge a +300 V reading should show, from the true factors."""
    at_reference = mu * truth["sensitivity_nC_per_MU"]
    return at_reference / (truth["k_TP"] * truth["k_pol"] * truth["k_s"])


@pytest.mark.parametrize(
    "profile", ["query-plain", "push-exponent", "query-engineering", "scpi-generic"]
)
def test_each_profile_reads_the_simulated_chamber_over_a_real_pty(simulator, profile):
    sim = simulator("--serial", "--profile", profile, "--seed", "11", *FAST)
    assert sim.info["profile"] == profile
    traffic = []
    driver = open_electrometer(
        profile, port=sim.serial, traffic=lambda d, t, raw: traffic.append((d.value, raw))
    )
    try:
        assert driver.identify().serial == "SIM-EM-0001"
        readings = [capture(driver, sim.control) for _ in range(3)]
    finally:
        driver.close()
    expected = expected_charge_nC(sim.control.truth())
    for sample in readings:
        assert sample.status is ReadingStatus.OK
        assert sample.charge_nC == pytest.approx(expected, rel=NOISE_BOUND)
    assert {direction for direction, _ in traffic} == {"tx", "rx"}


def test_scpi_driver_over_pyvisa_on_a_loopback_socket(simulator):
    sim = simulator("--scpi", "0", "--seed", "5", *FAST)
    assert sim.scpi.startswith("TCPIP::127.0.0.1::") and sim.scpi.endswith("::SOCKET")
    assert sim.info["serial"] is None
    driver = open_electrometer("scpi-generic", resource=sim.scpi)
    try:
        assert driver.identify().model == "SIM-SCPI"
        driver.set_bias(-300)
        negative = capture(driver, sim.control)
        driver.set_bias(300)
        for _ in range(3):  # let the chamber settle after the polarity change
            capture(driver, sim.control)
        positive = capture(driver, sim.control)
        driver.transport.write_line("NOT:A:COMMAND")
        with pytest.raises(InstrumentReportedError, match="-113"):
            driver.zero()
        with pytest.raises(SettingOutOfRange):
            driver.set_bias(1500)
        driver.set_range("LOW")  # full scale 50 nC in the simulator: 300 MU is too much
        over = capture(driver, sim.control, mu=300)
    finally:
        driver.close()
    truth = sim.control.truth()
    assert negative.charge_nC < 0 < positive.charge_nC
    assert positive.charge_nC == pytest.approx(expected_charge_nC(truth), rel=NOISE_BOUND)
    assert over.status is ReadingStatus.OVERRANGE


def test_visa_asrl_resource_on_the_pty(simulator):
    sim = simulator("--serial", "--profile", "query-plain", *FAST)
    driver = open_electrometer("query-plain", resource=f"ASRL{sim.serial}::INSTR")
    try:
        assert driver.identify().model == "QUERY-PLAIN"
        assert capture(driver, sim.control).charge_nC > 0
    finally:
        driver.close()


@pytest.mark.parametrize("profile", ["query-plain", "push-exponent"])
def test_the_pty_drops_and_comes_back_at_the_same_path(simulator, profile):
    sim = simulator("--serial", "--profile", profile, *FAST)
    driver = open_electrometer(profile, port=sim.serial)
    try:
        capture(driver, sim.control)
        sim.control.drop(0.2)
        with pytest.raises(InstrumentDisconnected):
            driver.identify()
            driver.identify()  # the first write may still land in a closing pty
        attempts = reconnect(driver, attempts=30, backoff_s=0.02)
        assert attempts >= 1
        assert driver.identify().serial == "SIM-EM-0001"
        assert capture(driver, sim.control).charge_nC > 0
    finally:
        driver.close()


def test_the_scpi_socket_drops_and_comes_back(simulator):
    with scpi_driver(simulator) as (sim, driver):
        driver.identify()
        sim.control.drop(0.3)
        with pytest.raises(InstrumentDisconnected):
            driver.identify()
        reconnect(driver, attempts=30, backoff_s=0.02)
        assert driver.identify().model == "SIM-SCPI"


def test_a_missing_port_is_instrument_disconnected_and_reconnect_gives_up(tmp_path):
    driver = build_electrometer("query-plain", port=str(tmp_path / "no-such-port"))
    with pytest.raises(InstrumentDisconnected, match="no-such-port"):
        reconnect(driver, attempts=3, backoff_s=0.0)


def test_port_and_resource_are_exclusive():
    with pytest.raises(SettingOutOfRange, match="exactly one"):
        build_electrometer("query-plain")
    with pytest.raises(SettingOutOfRange, match="exactly one"):
        build_electrometer("query-plain", port="/dev/null", resource="ASRL1::INSTR")


def test_same_seed_same_readings_whatever_the_timing(simulator):
    # The simulator draws its noise per delivery, so only leakage (1e-5 nC/s over simulated
    # time) depends on timing: at time scale 0.01, a few ms of jitter is ~1e-6 nC, below the
    # instrument's last digit (0.1 pC); rounding may still flip that digit, hence one count.
    runs = []
    for extra_readings in (0, 1):
        sim = simulator(
            "--serial", "--profile", "query-engineering", "--seed", "42", "--time-scale", "0.01"
        )
        driver = open_electrometer("query-engineering", port=sim.serial)
        try:
            values = []
            for _ in range(4):
                values.append(capture(driver, sim.control).charge_nC)
                if extra_readings:  # extra traffic between deliveries changes the timing only
                    driver.identify()
                    driver.read_charge()
            runs.append(values)
        finally:
            driver.close()
    assert runs[0] == pytest.approx(runs[1], abs=1.01e-4)
    assert len(set(runs[0])) == 4  # the noise is there, and it is the same noise


def test_silence_on_a_real_pty_is_an_instrument_timeout_not_a_hang(simulator, tmp_path):
    # A query-plain driver (short timeout) talking to an instrument that speaks SCPI: SCPI answers
    # unknown commands with nothing but an error-queue entry, so every attempt meets silence.
    text = Path(load_profile("query-plain").source).read_text(encoding="utf-8")
    impatient = tmp_path / "impatient.toml"
    impatient.write_text(text.replace("timeout_s = 1.0", "timeout_s = 0.05"), encoding="utf-8")
    sim = simulator("--serial", "--profile", "scpi-generic", *FAST)
    driver = open_electrometer(impatient, port=sim.serial)
    try:
        with pytest.raises(InstrumentTimeout, match="3 attempt"):
            driver.read_charge()
    finally:
        driver.close()


def test_garbage_over_a_real_pty_is_rejected_line_by_line(simulator, tmp_path):
    replies = [
        "\udcff\udcfeQ +1.0000 nC A",  # not ASCII (bytes 0xff 0xfe, kept by surrogateescape)
        "Q +1.0000 nC A",
        "Q +nan nC A",
        "Q +2.0000 nC O",
        "Q " + "9" * 300,  # over-long: the profile allows 128 bytes
        "Q +3.0000 nC A",
    ]
    log = tmp_path / "garbage.jsonl"
    entries = []
    for index, reply in enumerate(replies):
        entries.append({"t_s": index, "dir": "tx", "line": "Q?"})
        entries.append({"t_s": index + 0.1, "dir": "rx", "line": reply})
    log.write_text("".join(json.dumps(entry) + "\n" for entry in entries), encoding="utf-8")
    sim = simulator("--serial", "--profile", "query-plain", "--playback", str(log), "--speed", "0")
    driver = open_electrometer("query-plain", port=sim.serial)
    outcomes = []
    try:
        for _ in replies:
            try:
                sample = driver.read_charge()
                outcomes.append((sample.charge_nC, sample.status.value))
            except ProtocolError as error:
                outcomes.append(("rejected", error.line[:4]))
    finally:
        driver.close()
    assert outcomes == [
        ("rejected", b"\xff\xfeQ "),
        (1.0, "ok"),
        ("rejected", b"Q +n"),
        (2.0, "overrange"),
        ("rejected", b"Q 99"),
        (3.0, "ok"),
    ]
