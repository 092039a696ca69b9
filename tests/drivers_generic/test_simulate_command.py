"""`chargebook simulate` as a user runs it: its announcement line, and bad options refused."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from .conftest import FAST


def test_the_announcement_is_one_json_line_with_the_contract_keys(simulator):
    sim = simulator("--serial", "--scpi", "0", "--profile", "query-engineering", *FAST)
    assert set(sim.info) == {
        "serial", "scpi", "control", "profile", "pid", "sensor", "sensor_profile"
    }  # fmt: skip
    assert sim.info["pid"] == sim.process.pid
    assert sim.info["profile"] == "query-engineering"
    link = Path(sim.serial)
    assert link.is_symlink() and os.readlink(link).startswith("/dev/pts/")
    assert Path(sim.info["control"]).stat().st_mode & 0o777 == 0o600
    assert link.parent.stat().st_mode & 0o777 == 0o700


def test_without_options_it_serves_the_default_dialect_on_a_pty(simulator):
    sim = simulator(*FAST)
    assert sim.info["scpi"] is None and sim.info["profile"] == "query-plain"


@pytest.mark.parametrize(
    ("options", "words"),
    [
        (["--profile", "no-such-meter"], ["no-such-meter", "query-plain"]),
        (["--time-scale", "0"], ["--time-scale", "0"]),
        (["--scpi", "70000"], ["--scpi", "65535"]),
        (["--temperature-C", "80"], ["temperature_C", "80"]),
        (["--pressure-kPa", "20"], ["pressure_kPa", "20"]),
        (["--speed", "-1"], ["--speed"]),
        (["--playback", "/no/such/log.jsonl"], ["--playback", "log.jsonl"]),
    ],
)
def test_a_bad_option_exits_2_naming_it_and_prints_no_announcement(options, words):
    result = subprocess.run(
        [sys.executable, "-m", "chargebook", "simulate", *options],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert result.returncode == 2
    assert result.stdout == ""
    for word in words:
        assert word in result.stderr
