"""`chargebook show SESSION`: the stored session and its recomputed results, as text or JSON.

The station is a real SQLite file holding the invented example worksheet (Example Clinic
(fictional), DEMO-LA1 6 MV) recorded through the Store API.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.protocol import CAUTION
from chargebook.acquire.record.events import EventKind, ReplayNotReproduced
from chargebook.acquire.record.store import Store
from chargebook.acquire.reports.export import JSON_KEYS
from recorded_session import SUPERSEDE_REASON, record_example_session, recorded_station
from test_export import hand_dose_per_MU_cGy


@pytest.fixture
def station(tmp_path: Path) -> Path:
    return recorded_station(tmp_path)


def _value(text: str, label: str) -> str:
    """Return the value column of the text row that starts with ``label``."""
    (line,) = [line for line in text.splitlines() if line.startswith(label + "  ")]
    return line[len(label) :].split()[0]


def test_text_shows_every_section_and_the_results(station: Path, capsys) -> None:
    assert main(["show", "1", "--db", str(station)]) == EXIT_OK
    out = capsys.readouterr().out
    for title in ("Session", "Environment", "Reading sets", "Correction factors", "Results"):
        assert f"\n{title}\n" in f"\n{out}"
    assert float(_value(out, "dose per MU (cGy/MU)")) == pytest.approx(
        hand_dose_per_MU_cGy(), abs=5e-5
    )
    assert _value(out, "within tolerance") == "yes"
    assert SUPERSEDE_REASON in out
    assert "Instrument as identified" in out and "serial SIM-EM-0001" in out
    assert out.rstrip().endswith(CAUTION)
    assert "A pending factor" not in out  # every factor is known: no note says otherwise


def test_the_factor_table_says_a_factor_is_pending_only_when_one_is() -> None:
    from chargebook.acquire.reports.sections import factors_of
    from chargebook.corrections.evaluate import MeasurementInputs, evaluate

    nothing_measured = factors_of(evaluate(MeasurementInputs()))
    assert nothing_measured.note.startswith("A pending factor is not yet known")


def test_json_is_the_export(station: Path, capsys) -> None:
    assert main(["show", "1", "--db", str(station), "--json"]) == EXIT_OK
    data = json.loads(capsys.readouterr().out)
    assert tuple(data) == JSON_KEYS
    assert data["results"]["dose_per_MU_cGy"] == pytest.approx(hand_dose_per_MU_cGy(), rel=1e-9)


def test_a_reader_that_goes_away_ends_the_command_quietly(station: Path) -> None:
    process = subprocess.Popen(
        [sys.executable, "-m", "chargebook.acquire", "show", "1", "--db", str(station)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    process.stdout.close()  # like `| head` exiting before the report is written
    _, err = process.communicate(timeout=60)
    assert process.returncode == EXIT_FAILURE
    assert b"Traceback" not in err and err == b""


def test_an_unknown_session_is_named(station: Path, capsys) -> None:
    assert main(["show", "42", "--db", str(station)]) == EXIT_INVALID_INPUT
    err = capsys.readouterr().err
    assert "no session with id 42" in err and "chargebook sessions" in err


@pytest.mark.parametrize("command", ["show", "export", "verify", "replay"])
def test_an_id_beyond_sqlites_integers_is_an_unknown_session_not_a_traceback(
    station: Path, command: str, capsys
) -> None:
    too_big = str(2**63)  # the first whole number SQLite cannot bind (OverflowError before)
    assert main([command, too_big, "--db", str(station)]) == EXIT_INVALID_INPUT
    err = capsys.readouterr().err
    assert f"no session with id {too_big}" in err and "Traceback" not in err


def test_a_session_whose_values_cannot_be_evaluated_is_still_shown(tmp_path: Path, capsys) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        session_id = record_example_session(store, status="open")
        # A routine reading whose sign contradicts the rest of its set: evaluate refuses it.
        routine = store.sets(session_id)[1].id
        store.add_reading(session_id, routine, 7, 70.0, -14.75, "manual", False, "ok")
    assert main(["show", str(session_id), "--db", str(path)]) == EXIT_OK
    out = capsys.readouterr().out
    assert "No results: the recorded values cannot be evaluated: routine_nC[5]" in out
    assert "-14.7500" in out  # the reading is shown, nothing is lost


def test_terminal_escapes_in_stored_text_are_shown_not_obeyed(tmp_path: Path, capsys) -> None:
    # ESC [2J clears a terminal; stored text must never drive the reader's screen.
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        session_id = record_example_session(store, treatment_machine="LA\x1b[2J\x9b1")
    assert main(["show", str(session_id), "--db", str(path)]) == EXIT_OK
    out = capsys.readouterr().out
    assert "\x1b" not in out and "\x9b" not in out
    assert "LA\\x1b[2J\\x9b1" in out
    assert main(["sessions", "--db", str(path)]) == EXIT_OK
    assert "\x1b" not in capsys.readouterr().out


@pytest.mark.parametrize("columns", [80, 120])
def test_text_fits_the_terminal_width_and_loses_no_word(
    station: Path, columns: int, monkeypatch, capsys
) -> None:
    monkeypatch.setenv("COLUMNS", str(columns))  # what shutil.get_terminal_size reads first
    assert main(["show", "1", "--db", str(station)]) == EXIT_OK
    wrapped = capsys.readouterr().out
    assert max(len(line) for line in wrapped.splitlines()) <= columns

    monkeypatch.setenv("COLUMNS", "1000")
    assert main(["show", "1", "--db", str(station)]) == EXIT_OK
    wide = capsys.readouterr().out
    assert max(len(line) for line in wide.splitlines()) > columns  # there was something to wrap
    # Every word is still printed (a table with too many columns becomes one block per row, so
    # its headers repeat and its rules of dashes go).
    assert {word for word in wide.split() if set(word) != {"-"}} <= set(wrapped.split())


def test_a_replay_kept_although_its_traffic_log_did_not_reproduce_is_shown_as_such(
    station: Path, capsys
) -> None:
    # `replay --traffic-log F --keep` stores a replay of an edited log with a
    # replay_not_reproduced event; shown only as "Replay of session 1", it read as a
    # reproduction of the session.
    log = "/records/edited-copy.jsonl"
    with Store.open(station) as store:
        faithful = record_example_session(store, replay_of=1)
        kept = record_example_session(store, replay_of=1)
        why = "stored with --keep although this traffic log does not reproduce the session"
        store.add_event(
            kept,
            "replay",
            EventKind.REPLAY_NOT_REPRODUCED,
            ReplayNotReproduced(traffic_log=log, why=why),
        )
    shown = {}
    for session_id in (faithful, kept):
        assert main(["show", str(session_id), "--db", str(station)]) == EXIT_OK
        (line,) = [
            line
            for line in capsys.readouterr().out.splitlines()
            if line.startswith("Replay of session  ")
        ]
        shown[session_id] = line.removeprefix("Replay of session").strip()
    assert shown[faithful] == "1"
    assert shown[kept] == f"1, NOT reproduced: traffic log {log} differs, kept with --keep"
