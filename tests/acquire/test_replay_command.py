"""The replay's pace and clock, its options, and what it prints (no processes here)."""

from __future__ import annotations

import argparse
from pathlib import Path

import pytest
from chargebook.acquire.commands.replay import add_arguments, threshold_values
from chargebook.acquire.replay.compare import Change, Comparison, Difference
from chargebook.acquire.replay.conductor import Pacer
from chargebook.acquire.replay.session_replay import ReplayReport
from chargebook.acquire.replay.text import cell, replay_text
from chargebook.corrections.errors import InputError


class FakeTime:
    """A wall clock that only moves when slept on."""

    def __init__(self) -> None:
        self.now = 0.0
        self.slept: list[float] = []

    def clock(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        self.slept.append(seconds)
        self.now += seconds


def test_the_replay_keeps_the_recorded_pace_divided_by_the_speed():
    time = FakeTime()
    pacer = Pacer(2.0, clock=time.clock, sleep=time.sleep)
    for recorded_s in (100.0, 101.0, 103.0, 102.5):  # the last is already due
        pacer.wait_until(recorded_s)
    assert time.slept == [0.5, 1.0]


def test_speed_zero_never_waits():
    time = FakeTime()
    pacer = Pacer(0.0, clock=time.clock, sleep=time.sleep)
    for recorded_s in (100.0, 200.0, 300.0):
        pacer.wait_until(recorded_s)
    assert time.slept == []


def parse(*argv: str) -> argparse.Namespace:
    parser = argparse.ArgumentParser()
    add_arguments(parser)
    return parser.parse_args(["7", *argv])


def test_threshold_options_are_read_as_numbers_file_first_then_each_option(tmp_path: Path):
    path = tmp_path / "strict.toml"
    path.write_text("relative_sd_pct = 0.1\nminimum_readings = 5\n")
    args = parse("--thresholds", str(path), "--threshold", "relative_sd_pct=0.05")
    assert threshold_values(args) == {"relative_sd_pct": 0.05, "minimum_readings": 5}


@pytest.mark.parametrize("item", ["relative_sd_pct", "relative_sd_pct=low", "=0.1x"])
def test_a_threshold_that_cannot_be_read_is_refused_naming_the_option(item: str):
    with pytest.raises(InputError) as refused:
        threshold_values(parse("--threshold", item))
    assert refused.value.field == "--threshold" and item in str(refused.value)


def report(differences: list[Difference], changes: list[Change] | None = None) -> ReplayReport:
    comparison = Comparison(12, 34, differences, changes or [])
    return ReplayReport(3, 9, "query-plain", 0.0, 266, comparison, what_if=bool(changes))


def test_an_exact_replay_says_so_in_one_line():
    text = replay_text(report([]))
    assert text.splitlines() == [
        "Replay of session 3 as session 9: profile query-plain, speed 0, 266 traffic lines",
        "exact reproduction: 12 readings, 34 results identical",
    ]


def test_a_what_if_lists_its_changes_and_each_difference_with_its_reason(monkeypatch):
    monkeypatch.delenv("COLUMNS", raising=False)
    change = Change("threshold relative_sd_pct", 0.2, 0.01)
    flags = Difference(
        "result flags",
        [{"code": "reduced_drift", "message": "The reduced-bias set drifts."}],
        [
            {"code": "routine_sd_high", "message": "The routine set's relative SD is high."},
            {"code": "reduced_drift", "message": "The reduced-bias set drifts."},
        ],
        "threshold relative_sd_pct 0.2 → 0.01",
    )
    k_pol = Difference("k_pol", 1.0067123456, 1.0070123, "threshold relative_sd_pct 0.2 → 0.01")
    lines = replay_text(report([flags, k_pol], [change])).splitlines()
    assert lines[1] == "changed: threshold relative_sd_pct 0.2 → 0.01"
    assert lines[2] == "what differs: 2 differences over 12 readings, 34 results"
    rows = [line.split("  ") for line in lines[4:]]
    assert [cell.strip() for cell in rows[0] if cell.strip()] == [
        "what", "original", "replay", "change"
    ]  # fmt: skip
    # Flags in words (the one the replay added), values at display precision with the change
    # in %, and the reason said once under the table.
    assert "The routine set's relative SD is high." in lines[6] and "—" in lines[6]
    assert lines[7].split() == ["k_pol", "1.00671", "1.00701", "+0.0298", "%"]
    assert lines[8:] == ["  why: threshold relative_sd_pct 0.2 → 0.01"]


def test_an_unchanged_replay_that_does_not_reproduce_shows_every_digit(monkeypatch):
    monkeypatch.delenv("COLUMNS", raising=False)
    last_bit = Difference("M_raw_nC", 19.5974, 19.597400000000004, "the readings differ")
    text = replay_text(report([last_bit]))
    assert "19.5974   19.597400000000004" in text
    assert "NOT reproduced: 1 difference" in text


def test_numbers_in_a_difference_are_shown_to_the_last_digit():
    assert (cell(19.5974), cell(19.597400000000004)) == ("19.5974", "19.597400000000004")
