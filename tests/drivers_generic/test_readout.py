"""The README's lines: the simulator in one process, ten captures read through the driver in
another, for each shipped profile (and SCPI over the loopback socket)."""

from __future__ import annotations

import re
import subprocess
import sys

import pytest

from .conftest import FAST

CAPTURE_LINE = re.compile(r"\s*(\d+)\s+([+-]\d+\.\d{5}) nC\s+ok")


def readout(*options: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "chargebook.drivers_generic.readout", *options],
        capture_output=True,
        text=True,
        timeout=120,
        stdin=subprocess.DEVNULL,
    )


@pytest.mark.parametrize(
    "profile", ["query-plain", "push-exponent", "query-engineering", "scpi-generic"]
)
def test_ten_captures_through_the_serial_driver(simulator, profile):
    sim = simulator("--serial", "--profile", profile, *FAST)
    result = readout(
        "--profile", profile, "--port", sim.serial, "--bench", sim.info["control"], "--count", "10"
    )  # fmt: skip
    assert result.returncode == 0, result.stderr
    captures = [CAPTURE_LINE.fullmatch(line) for line in result.stdout.splitlines()]
    charges = [float(match[2]) for match in captures if match]
    assert len(charges) == 10
    assert all(19.0 < charge < 21.0 for charge in charges)  # ~20 nC per 100 MU (common practice)
    assert "mean" in result.stdout.splitlines()[-1]


def test_ten_captures_through_scpi_on_the_loopback_socket(simulator):
    sim = simulator("--scpi", "0", *FAST)
    result = readout(
        "--profile", "scpi-generic", "--resource", sim.scpi, "--bench", sim.info["control"]
    )  # fmt: skip
    assert result.returncode == 0, result.stderr
    assert sum(bool(CAPTURE_LINE.fullmatch(line)) for line in result.stdout.splitlines()) == 10


def test_a_port_that_is_not_there_is_a_clear_error(tmp_path):
    result = readout("--profile", "query-plain", "--port", str(tmp_path / "ttyNone"))
    assert result.returncode == 2
    assert "ttyNone" in result.stderr and "Traceback" not in result.stderr


def test_without_a_bench_and_without_an_operator_it_stops_cleanly(simulator):
    sim = simulator("--serial", *FAST)
    result = readout("--profile", "query-plain", "--port", sim.serial, "--count", "1")
    assert result.returncode == 1
    assert "Deliver 100 MU" in result.stdout and "no beam was confirmed" in result.stderr
