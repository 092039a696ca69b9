"""Calibration visits in the record (issue 15 item 1): a real SQLite file through the Store.

The beams are those of the invented demo clinic (Example Clinic (fictional), DEMO-LA1); the
sessions are recorded through the Store API as the daemon records them.
"""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
from chargebook.acquire.record import visits
from chargebook.acquire.record.migrations import MIGRATIONS
from chargebook.acquire.record.review import record_visit_review
from chargebook.acquire.record.store import Store
from chargebook.acquire.record.verify import verify_all, verify_session
from chargebook.corrections.errors import InputError

OPERATOR = "operator A"
REVIEWER = "reviewer B"


@pytest.fixture
def store(tmp_path: Path):
    with Store.open(tmp_path / "station.sqlite") as opened:
        yield opened


def _session(store: Store, beam: str, status: str = "finished") -> int:
    session_id = store.create_session({"operator": OPERATOR}, {}, "trs398", beam)
    if status != "open":
        store.set_session_status(session_id, status, reason=f"{status} for the test")
    return session_id


def _visit(store: Store) -> tuple[int, int, int, int]:
    visit_id = visits.create_visit(store, "DEMO-LA1", {"operator": OPERATOR}, OPERATOR)
    beams = [
        visits.add_beam(store, visit_id, name, plan, {"beam": name}, OPERATOR)
        for name, plan in (("6 MV", "default"), ("10 MV", "default"), ("9 MeV", "monthly-check"))
    ]
    return visit_id, *beams


def test_the_visits_migration_is_appended_after_the_input_log_under_its_name() -> None:
    names = [migration.name for migration in MIGRATIONS]
    assert names.index("visits") == names.index("input_log") + 1


def test_beams_keep_the_order_they_were_added_in_and_each_session_is_linked(store) -> None:
    visit_id, six, *_ = _visit(store)
    assert [b.name for b in visits.beams(store, visit_id)] == ["6 MV", "10 MV", "9 MeV"]
    session = store.create_session({"operator": OPERATOR}, {}, "trs398", "6 MV")
    visits.link_session(store, visit_id, six, session, OPERATOR)
    assert visits.visit_of_session(store, session) == (visit_id, six)
    states = {s.beam.name: s for s in visits.beam_states(store, visit_id)}
    assert states["6 MV"].status == "measuring"
    assert states["10 MV"].status == "planned"
    # The session's own chain names its visit and beam.
    event = store.events(session)[-1]
    assert event.kind == visits.SESSION_BEAM
    assert event.detail()["beam"] == "6 MV" and event.detail()["visit_id"] == visit_id


def test_two_beams_of_one_name_are_refused_by_name_and_nothing_is_written(store) -> None:
    visit_id, *_ = _visit(store)
    rows_before = store.read("SELECT count(*) FROM visit_beams")
    with pytest.raises(InputError) as refused:
        visits.add_beam(store, visit_id, " 6  mv ", "default", {}, OPERATOR)
    assert refused.value.field == "beam"
    assert "already beam 1" in str(refused.value)
    assert store.read("SELECT count(*) FROM visit_beams") == rows_before


def test_a_beam_skipped_or_aborted_says_why_and_an_aborted_one_may_be_measured_again(
    store,
) -> None:
    visit_id, six, ten, _nine = _visit(store)
    aborted = _session(store, "6 MV", "aborted")
    visits.link_session(store, visit_id, six, aborted, OPERATOR)
    visits.mark_beam(store, visit_id, ten, "skipped", "beam not released by service", OPERATOR)
    states = {s.beam.name: s for s in visits.beam_states(store, visit_id)}
    assert (states["6 MV"].status, states["6 MV"].reason) == ("unfinished", "aborted for the test")
    assert (states["10 MV"].status, states["10 MV"].reason) == (
        "skipped",
        "beam not released by service",
    )
    again = _session(store, "6 MV")
    visits.link_session(store, visit_id, six, again, OPERATOR)
    six_state = visits.beam_states(store, visit_id)[0]
    assert six_state.status == "measured"
    assert six_state.sessions == (aborted, again)


def test_a_measured_beam_cannot_be_marked_skipped(store) -> None:
    visit_id, six, *_ = _visit(store)
    visits.link_session(store, visit_id, six, _session(store, "6 MV"), OPERATOR)
    with pytest.raises(InputError, match="is measured"):
        visits.mark_beam(store, visit_id, six, "skipped", "changed my mind", OPERATOR)


def test_closing_records_the_beams_never_measured_as_unfinished_with_the_reason(store) -> None:
    visit_id, six, *_ = _visit(store)
    visits.link_session(store, visit_id, six, _session(store, "6 MV"), OPERATOR)
    with pytest.raises(InputError) as refused:
        visits.close_visit(store, visit_id, None, OPERATOR)
    assert refused.value.field == "reason"
    visits.close_visit(store, visit_id, "machine handed back to the clinic", OPERATOR)
    found = visits.visit(store, visit_id)
    assert found.status == "closed" and found.closed_at is not None
    reasons = [s.reason for s in visits.beam_states(store, visit_id)[1:]]
    assert reasons == ["the visit was closed: machine handed back to the clinic"] * 2
    with pytest.raises(InputError, match="is closed"):
        visits.add_beam(store, visit_id, "15 MV", "default", {}, OPERATOR)


def test_a_visit_with_a_beam_being_measured_cannot_close(store) -> None:
    visit_id, six, *_ = _visit(store)
    visits.link_session(store, visit_id, six, _session(store, "6 MV", "open"), OPERATOR)
    with pytest.raises(InputError, match="still being measured"):
        visits.close_visit(store, visit_id, "end of day", OPERATOR)


def test_one_visit_at_a_time(store) -> None:
    _visit(store)
    with pytest.raises(InputError) as refused:
        visits.create_visit(store, "DEMO-LA1", {"operator": OPERATOR}, OPERATOR)
    assert refused.value.field == "visit"


def test_the_visit_rows_are_chained_and_a_changed_row_is_named(store, tmp_path) -> None:
    visit_id, six, *_ = _visit(store)
    visits.link_session(store, visit_id, six, _session(store, "6 MV"), OPERATOR)
    visits.close_visit(store, visit_id, "end of day", OPERATOR)
    assert all(report.verified for report in verify_all(store))
    conn = sqlite3.connect(tmp_path / "station.sqlite")
    conn.execute("DROP TRIGGER visit_beams_refuse_update")
    conn.execute("UPDATE visit_beams SET plan = 'monthly-check' WHERE id = ?", (six,))
    conn.commit()
    conn.close()
    report = verify_session(store, None)
    assert not report.verified
    assert report.problems[0].table == "visit_beams" and report.problems[0].row_id == six


def test_the_record_refuses_a_visit_status_changed_without_its_event(store) -> None:
    visit_id, *_ = _visit(store)
    with pytest.raises(sqlite3.DatabaseError, match="visit_status event"):
        store.db.execute("UPDATE visits SET status = 'closed' WHERE id = ?", (visit_id,))
    with pytest.raises(sqlite3.DatabaseError, match="append-only"):
        store.db.execute("DELETE FROM visit_beams")


def test_a_closed_visit_is_reviewed_once_by_a_second_person(store) -> None:
    visit_id, six, *_ = _visit(store)
    visits.link_session(store, visit_id, six, _session(store, "6 MV"), OPERATOR)
    with pytest.raises(InputError, match="is open"):
        record_visit_review(store, visit_id, "approve", REVIEWER, "checked")
    visits.close_visit(store, visit_id, "two beams left for next week", OPERATOR)
    with pytest.raises(InputError) as refused:
        record_visit_review(store, visit_id, "approve", "Operator  A", "my own work")
    assert refused.value.field == "reviewer"
    review = record_visit_review(store, visit_id, "approve", REVIEWER, "checked the log")
    assert (review.status, review.reviewer, review.measured_by) == ("approved", REVIEWER, OPERATOR)
    with pytest.raises(InputError, match="already approved"):
        record_visit_review(store, visit_id, "reject", "reviewer C", "second opinion")


def test_a_visit_with_no_beam_measured_can_only_be_rejected(store) -> None:
    visit_id, six, *_ = _visit(store)
    visits.link_session(store, visit_id, six, _session(store, "6 MV", "aborted"), OPERATOR)
    visits.close_visit(store, visit_id, "electrometer failed", OPERATOR)
    with pytest.raises(InputError) as refused:
        record_visit_review(store, visit_id, "approve", REVIEWER, "fine")
    assert refused.value.field == "decision"
    assert record_visit_review(store, visit_id, "reject", REVIEWER, "redo").status == "rejected"
