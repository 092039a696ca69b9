"""Review and sign-off (issue 15 item 2), written directly on a station file with no daemon.

The station is a real SQLite file holding the invented example worksheet (Example Clinic
(fictional), measured by "operator A") recorded through the Store API; `chargebook review` runs
in-process (``main``), as the command line would. A review through the real daemon is in
``tests/e2e/test_review_e2e.py``.
"""

from __future__ import annotations

import getpass
import json
import sqlite3
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.review import record_review, review_of
from chargebook.acquire.record.station_lock import StationLock
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_all
from chargebook.corrections.errors import InputError
from recorded_session import OPERATOR, record_example_session

REVIEWER = "reviewer B"


@pytest.fixture
def station(tmp_path: Path) -> Path:
    """Sessions 1 finished (6 MV), 2 aborted, 3 open, 4 finished (6 MV), all by operator A."""
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        record_example_session(store)
        record_example_session(store, status="aborted")
        record_example_session(store, status="open")
        record_example_session(store, scale=1.01)
    return path


def _review(station: Path, session: int, decision: str, reviewer: str, *extra: str) -> int:
    args = ["review", str(session), f"--{decision}", "--reviewer", reviewer]
    return main([*args, "--comment", "checked against the logbook", "--db", str(station), *extra])


def _dump(station: Path) -> list[tuple]:
    """Return every row of every table, to show that a refusal wrote nothing."""
    conn = sqlite3.connect(station)
    tables = [row[0] for row in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")]
    rows = [(t, *r) for t in sorted(tables) for r in conn.execute(f"SELECT * FROM {t}")]
    conn.close()
    return rows


def test_an_approval_is_an_audit_event_with_who_and_when(station: Path, capsys) -> None:
    assert _review(station, 1, "approve", REVIEWER) == EXIT_OK
    assert f"session 1 approved by {REVIEWER}" in capsys.readouterr().out
    with Store.open(station, read_only=True) as store:
        event = store.events(1)[-1]
        reports = verify_all(store)
    assert (event.kind, event.actor) == (EventKind.SESSION_REVIEWED, REVIEWER)
    assert event.account == getpass.getuser()  # the Unix account that asked, beside the name
    assert event.detail()["status"] == "approved"
    assert event.detail()["measured_by"] == OPERATOR
    assert event.recorded_at.startswith("20")
    assert all(report.verified for report in reports)  # the review is in the hash chain


@pytest.mark.parametrize("name", [OPERATOR, "Operator a", "  OPERATOR   A "])
def test_the_operator_who_measured_cannot_review(station: Path, name: str, capsys) -> None:
    before = _dump(station)
    assert _review(station, 1, "approve", name) == EXIT_INVALID_INPUT
    error = capsys.readouterr().err
    assert "reviewer" in error and "measured this session" in error and OPERATOR in error
    assert _dump(station) == before  # nothing recorded, nothing lost


def test_self_review_when_allowed_is_recorded_as_allowed(station: Path) -> None:
    assert _review(station, 1, "approve", OPERATOR, "--allow-self-review") == EXIT_OK
    with Store.open(station, read_only=True) as store:
        assert store.events(1)[-1].detail()["self_review_allowed"] is True


def test_the_unix_account_that_started_the_session_cannot_review(tmp_path: Path) -> None:
    with Store.memory() as store:
        with store.on_behalf_of("bench-account"):
            session = record_example_session(store)
        with pytest.raises(InputError, match="started this session") as refused:
            record_review(store, session, "approve", "BENCH-ACCOUNT", "fine")
        assert refused.value.field == "reviewer"
        assert record_review(store, session, "approve", REVIEWER, "fine").status == "approved"


def test_an_aborted_session_is_rejected_but_never_approved(station: Path, capsys) -> None:
    before = _dump(station)
    assert _review(station, 2, "approve", REVIEWER) == EXIT_INVALID_INPUT
    error = capsys.readouterr().err
    assert "decision" in error and "cannot approve session 2: it was aborted" in error
    assert _dump(station) == before
    assert _review(station, 2, "reject", REVIEWER) == EXIT_OK


def test_an_open_session_and_a_second_review_are_refused(station: Path, capsys) -> None:
    assert _review(station, 3, "approve", REVIEWER) == EXIT_INVALID_INPUT
    assert "is open: a session is reviewed once it is closed" in capsys.readouterr().err
    assert _review(station, 1, "reject", REVIEWER) == EXIT_OK
    assert _review(station, 1, "approve", "reviewer C") == EXIT_INVALID_INPUT
    assert f"is already rejected by {REVIEWER}" in capsys.readouterr().err
    assert _review(station, 99, "approve", REVIEWER) == EXIT_INVALID_INPUT


def test_an_empty_comment_is_refused_by_name(station: Path, capsys) -> None:
    args = ["review", "1", "--approve", "--reviewer", REVIEWER, "--comment", " "]
    assert main([*args, "--db", str(station)]) == EXIT_INVALID_INPUT
    assert "comment" in capsys.readouterr().err


def test_a_direct_review_holds_the_station_lock_while_it_writes(station: Path) -> None:
    # A daemon takes the station lock first; the review must then not write behind it.
    with StationLock(station):
        no_daemon = str(station.parent / "no.sock")
        assert _review(station, 1, "approve", REVIEWER, "--socket", no_daemon) == EXIT_FAILURE
    with Store.open(station, read_only=True) as store:
        assert all(event.kind != EventKind.SESSION_REVIEWED for event in store.events(1))


def test_sessions_and_show_say_unreviewed_approved_or_rejected(station: Path, capsys) -> None:
    assert _review(station, 1, "approve", REVIEWER) == EXIT_OK
    assert _review(station, 2, "reject", REVIEWER) == EXIT_OK
    capsys.readouterr()
    assert main(["sessions", "--db", str(station), "--json"]) == EXIT_OK
    rows = {row["id"]: row for row in json.loads(capsys.readouterr().out)}
    assert [rows[n]["review"] for n in (1, 2, 3, 4)] == [
        "approved",
        "rejected",
        "unreviewed",
        "unreviewed",
    ]
    assert rows[1]["reviewer"] == REVIEWER and rows[1]["reviewed_at"].startswith("20")
    assert main(["sessions", "--db", str(station)]) == EXIT_OK
    table = capsys.readouterr().out
    assert f"approved by {REVIEWER}" in table and "unreviewed" in table
    assert main(["show", "1", "--db", str(station)]) == EXIT_OK
    shown = capsys.readouterr().out
    assert f"approved by {REVIEWER} on " in shown and "checked against the logbook" in shown
    assert main(["show", "4", "--db", str(station), "--json"]) == EXIT_OK
    assert json.loads(capsys.readouterr().out)["review"] is None
    assert main(["export", "2", "--db", str(station), "--format", "json"]) == EXIT_OK
    assert json.loads(capsys.readouterr().out)["review"]["status"] == "rejected"
    assert main(["export", "1", "--db", str(station), "--format", "html"]) == EXIT_OK
    assert f'data-key="review"><td>Review</td><td>approved by {REVIEWER}' in (
        capsys.readouterr().out
    )


def test_history_leaves_a_rejected_session_out_unless_all(station: Path, capsys) -> None:
    assert _review(station, 4, "reject", REVIEWER) == EXIT_OK
    capsys.readouterr()
    history = ["history", "--beam", "6 MV", "--db", str(station), "--format", "json"]
    assert main(history) == EXIT_OK
    assert [p["session_id"] for p in json.loads(capsys.readouterr().out)["points"]] == [1]
    assert main([*history, "--all"]) == EXIT_OK
    points = {p["session_id"]: p for p in json.loads(capsys.readouterr().out)["points"]}
    assert points[4]["review"] == "rejected" and points[1]["review"] == "unreviewed"
    with Store.open(station, read_only=True) as store:
        assert points[4]["session_uuid"] == store.session(4).uuid  # carried in this export too
    assert main(["history", "--beam", "6 MV", "--db", str(station), "--all"]) == EXIT_OK
    assert "finished, rejected" in capsys.readouterr().out


def test_a_replay_is_not_a_measurement_and_cannot_be_reviewed(tmp_path: Path) -> None:
    with Store.memory() as store:
        original = record_example_session(store)
        replay = record_example_session(store, replay_of=original)
        with pytest.raises(InputError, match=f"is a replay of session {original}") as refused:
            record_review(store, replay, "approve", "reviewer B", "fine")
        assert refused.value.field == "session"
        assert record_review(store, original, "approve", "reviewer B", "fine").status == "approved"


SELF_WORDS = f"approved by {OPERATOR} (self-review, allowed by --allow-self-review)"


def test_an_allowed_self_review_is_said_wherever_a_person_reads(
    station: Path, tmp_path: Path, capsys
) -> None:
    assert _review(station, 1, "approve", OPERATOR, "--allow-self-review") == EXIT_OK
    assert _review(station, 4, "approve", REVIEWER) == EXIT_OK
    capsys.readouterr()
    assert main(["sessions", "--db", str(station)]) == EXIT_OK
    lines = capsys.readouterr().out.splitlines()
    one = next(line for line in lines if line.split()[:1] == ["1"])
    four = next(line for line in lines if line.split()[:1] == ["4"])
    assert SELF_WORDS.removeprefix("approved ") in one  # the table's "by ..." cell
    assert "self-review" not in four and f"by {REVIEWER}" in four
    assert main(["show", "1", "--db", str(station)]) == EXIT_OK
    shown = capsys.readouterr().out
    assert SELF_WORDS in shown
    audit = shown[shown.index("Audit") :]
    assert "session approved" in audit
    assert f"by {OPERATOR} (self-review, allowed by --allow-self-review); comment: checked" in audit
    page = tmp_path / "1.html"
    assert main(["export", "1", "--format", "html", "-o", str(page), "--db", str(station)]) == 0
    html = page.read_text(encoding="utf-8")
    block = html[html.index('data-key="review"') :]
    assert "self-review, allowed by --allow-self-review" in block
    assert "session approved" in html  # the audit table lists the review
    assert main(["show", "4", "--db", str(station)]) == EXIT_OK
    assert f"by {REVIEWER}, a second person; comment: checked" in capsys.readouterr().out


def test_the_allowance_alone_does_not_make_a_second_person_a_self_reviewer(station: Path) -> None:
    assert _review(station, 1, "approve", REVIEWER, "--allow-self-review") == EXIT_OK
    with Store.open(station, read_only=True) as store:
        found = review_of(store.events(1))
    assert found.self_review is False
