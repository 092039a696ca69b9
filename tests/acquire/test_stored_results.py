"""The closed sessions' results kept in the record (``session_results``), and when they are used.

Sessions are recorded with the real engine into real SQLite files (the session of
``test_session_evaluation``: invented readings, demo only). A kept result is used only when its
stamp is the running evaluation's; a stale one is never shown, the daemon refreshes it, and
``verify`` names one that no longer equals a fresh evaluation.
"""

from __future__ import annotations

import asyncio
import json
import shutil
import sqlite3
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_OK
from chargebook.acquire.record.migrations import MIGRATIONS
from chargebook.acquire.record.store import Store
from chargebook.acquire.reports.history import load_history
from chargebook.acquire.session import stored_result
from chargebook.acquire.session.stored_result import (
    ResultSummary,
    evaluate_summary,
    evaluation_stamp,
    missing_results,
    refresh_results,
    stored_row,
)
from test_session_evaluation import record

from tests.acquire.in_process_daemon import InProcessDaemon, running

BEAM = demo_metadata()["beam"]


@pytest.fixture(scope="module")
def unkept(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, int, dict]:
    """A finished session recorded without keeping its result (as before the migration)."""
    path = tmp_path_factory.mktemp("unkept") / "station.sqlite"
    session_id, console = record(path)
    return path, session_id, console


def _copy(path: Path, tmp_path: Path) -> Path:
    copy = tmp_path / "station.sqlite"
    shutil.copyfile(path, copy)
    return copy


def _set_result(path: Path, stamp: str, dose_per_MU_cGy: float) -> None:
    """Write a kept result by hand, sealed, as a bug in the evaluation could leave it."""
    with Store.open(path) as store:
        (session_id,) = [row.id for row in store.sessions()]
        summary = evaluate_summary(store, session_id)
        data = {**json.loads(summary.to_json()), "dose_per_MU_cGy": dose_per_MU_cGy}
        wrong = stored_result.ResultSummary.from_json(json.dumps(data))
        store.put_session_result(
            session_id, stamp, stored_result.sealed_json(session_id, stamp, wrong)
        )


def _edit_result(path: Path, sql_expression: str) -> None:
    """Change the kept result with sqlite3, as someone editing the file outside chargebook."""
    with sqlite3.connect(path) as db:
        db.execute(f"UPDATE session_results SET result_json = {sql_expression}")


def test_the_migration_is_appended_after_the_input_log_and_visits_under_its_name() -> None:
    names = [migration.name for migration in MIGRATIONS]
    assert names.index("session_results") == names.index("visits") + 1


def test_a_session_recorded_before_results_were_kept_is_evaluated_live_then_refreshed(
    unkept, tmp_path
) -> None:
    path = _copy(unkept[0], tmp_path)
    session_id, console = unkept[1], unkept[2]
    with Store.open(path, read_only=True) as store:
        assert store.session_results() == {}
        (live,) = load_history(store, BEAM).points
    assert live.dose_per_MU_cGy == console["dose_per_MU_cGy"]
    with Store.open(path) as store:
        assert refresh_results(store) == 1
        assert refresh_results(store) == 0  # nothing left to refresh
        stamp, text = store.session_results()[session_id]
        (kept,) = load_history(store, BEAM).points
    assert stamp == evaluation_stamp()
    assert ResultSummary.from_json(text).dose_per_MU_cGy == console["dose_per_MU_cGy"]
    assert kept == live


def test_a_result_kept_by_another_evaluation_is_never_shown(unkept, tmp_path) -> None:
    path = _copy(unkept[0], tmp_path)
    _set_result(path, "another version", 9.999)
    with Store.open(path, read_only=True) as store:
        (point,) = load_history(store, BEAM).points
    assert point.dose_per_MU_cGy == unkept[2]["dose_per_MU_cGy"] != 9.999
    with Store.open(path) as store:
        assert refresh_results(store) == 1  # the stale row is rewritten
        (point,) = load_history(store, BEAM).points
    assert point.dose_per_MU_cGy == unkept[2]["dose_per_MU_cGy"]


def test_the_evaluation_stamp_changes_with_the_source_of_the_evaluation(
    tmp_path, monkeypatch: pytest.MonkeyPatch
) -> None:
    root = stored_result._ROOT
    for name in (*stored_result.EVALUATION_SOURCES, "acquire/reports/history.py"):
        source = root / name
        target = tmp_path / name
        if source.is_dir():
            shutil.copytree(source, target, ignore=shutil.ignore_patterns("__pycache__"))
        else:
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(source, target)
    monkeypatch.setattr(stored_result, "_ROOT", tmp_path)
    stamp = stored_result.evaluation_stamp.__wrapped__
    copied = stamp()
    assert copied == evaluation_stamp()  # the same source, the same stamp
    (tmp_path / "acquire/reports/history.py").write_text("# not part of the evaluation\n")
    assert stamp() == copied
    for changed in ("corrections/dose.py", "acquire/session/evaluation.py"):
        path = tmp_path / changed
        original = path.read_text()
        path.write_text(original + "\n# one more line\n")
        assert stamp() != copied, changed
        path.write_text(original)
    assert stamp() == copied


def test_without_the_evaluation_source_no_stored_result_is_ever_trusted(
    tmp_path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(stored_result, "_ROOT", tmp_path)  # an installation without .py files
    stamp = stored_result.evaluation_stamp.__wrapped__
    first, second = stamp(), stamp()
    assert first != second and first.startswith("unstamped-")


def test_resuming_an_interrupted_session_drops_its_kept_result(tmp_path) -> None:
    with Store.open(tmp_path / "station.sqlite") as store:
        store.results_on_close = stored_row
        session_id = store.create_session(
            demo_metadata(), {"steps": []}, "TRS-398", BEAM, actor="operator A"
        )
        store.set_session_status(session_id, "interrupted", "daemon stopped")
        assert session_id in store.session_results()
        store.set_session_status(session_id, "open", "resumed")
        assert store.session_results() == {}


def test_a_failing_evaluation_never_stops_a_session_from_closing(
    tmp_path, monkeypatch: pytest.MonkeyPatch
) -> None:
    def broken(store: object, session_id: int) -> ResultSummary:
        raise RuntimeError("a bug in the evaluation")

    monkeypatch.setattr(stored_result, "evaluate_summary", broken)
    with Store.open(tmp_path / "station.sqlite") as store:
        store.results_on_close = stored_row
        session_id = store.create_session(
            demo_metadata(), {"steps": []}, "TRS-398", BEAM, actor="operator A"
        )
        store.set_session_status(session_id, "finished", "plan complete")
        assert store.session(session_id).status == "finished"
        assert store.session_results() == {}  # nothing kept: evaluated live, where it shows


def test_verify_names_a_kept_result_that_no_longer_equals_a_fresh_evaluation(
    unkept, tmp_path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = _copy(unkept[0], tmp_path)
    session_id = unkept[1]
    with Store.open(path) as store:
        refresh_results(store)
    assert main(["verify", "--db", str(path)]) == EXIT_OK
    capsys.readouterr()
    _set_result(path, evaluation_stamp(), 9.999)
    assert main(["verify", str(session_id), "--db", str(path)]) == EXIT_FAILURE
    out = capsys.readouterr().out
    assert f"session {session_id}: its stored result differs" in out
    assert "dose_per_MU_cGy: stored 9.999" in out
    assert main(["verify", "--db", str(path), "--json"]) == EXIT_FAILURE
    found = json.loads(capsys.readouterr().out)
    assert not found["verified"] and len(found["stored_results"]) == 1


async def test_the_daemon_keeps_each_result_as_the_session_closes_and_refreshes_old_ones(
    unkept, tmp_path
) -> None:
    path = _copy(unkept[0], tmp_path)
    old_id = unkept[1]
    async with running(InProcessDaemon(tmp_path, db_path=path)) as daemon:
        daemon.let_time_run()
        client, operator = await daemon.operator()
        final = await operator.run(demo_metadata())
        await client.close()
        new_id = final["session"]["id"]
        assert final["session"]["status"] == "finished"
        with Store.open(path, read_only=True) as store:
            kept = store.session_results()
        assert kept[new_id][0] == evaluation_stamp()  # written as the session closed
        summary = ResultSummary.from_json(kept[new_id][1])
        assert summary.dose_per_MU_cGy == final["results"]["dose_per_MU_cGy"]
        for _ in range(1200):  # refreshed in the background, between the loop's other work
            if old_id in _kept_ids(path):
                break
            await asyncio.sleep(0.05)
    with Store.open(path, read_only=True) as store:
        assert store.session_results()[old_id][0] == evaluation_stamp()


def _kept_ids(path: Path) -> set[int]:
    with sqlite3.connect(f"file:{path}?mode=ro", uri=True) as connection:
        return {row[0] for row in connection.execute("SELECT session_id FROM session_results")}


@pytest.mark.parametrize("respaced", [False, True])
def test_a_kept_result_is_trusted_by_its_sealed_content_however_spaced(
    unkept, tmp_path, respaced: bool
) -> None:
    path = _copy(unkept[0], tmp_path)
    _set_result(path, evaluation_stamp(), 9.999)  # sealed by chargebook: shown as kept
    if respaced:  # the same content, written without spaces (SQLite's json() minifies)
        _edit_result(path, "json(result_json)")
    with Store.open(path, read_only=True) as store:
        (text,) = [text for _, text in store.session_results().values()]
        (point,) = load_history(store, BEAM).points
    assert (": " in text) is not respaced
    assert point.dose_per_MU_cGy == 9.999  # the kept value, not a live evaluation


@pytest.mark.parametrize(
    ("edit", "named"),
    [
        ("json_set(result_json, '$.dose_per_MU_cGy', 1.05)", "changed after it was kept"),
        ("'{not json'", "is not JSON"),
        ("json_remove(result_json, '$.dose_per_MU_cGy')", "changed after it was kept"),
    ],
)
def test_a_kept_result_edited_outside_chargebook_is_not_shown_and_verify_names_it(
    unkept, tmp_path, capsys: pytest.CaptureFixture[str], edit: str, named: str
) -> None:
    path = _copy(unkept[0], tmp_path)
    session_id, console = unkept[1], unkept[2]
    with Store.open(path) as store:
        refresh_results(store)
    _edit_result(path, edit)
    with Store.open(path, read_only=True) as store:
        (point,) = load_history(store, BEAM).points
    assert point.dose_per_MU_cGy == console["dose_per_MU_cGy"]  # evaluated from the record
    assert main(["verify", "--db", str(path)]) == EXIT_FAILURE
    out = capsys.readouterr().out
    assert f"session {session_id}: its stored result" in out and named in out


def _drop_kept_results(path: Path) -> None:
    """Drop the kept results' table with sqlite3, as someone tidying the file by hand."""
    with sqlite3.connect(path) as db:
        db.execute("DROP TABLE session_results")


def test_verify_checks_the_record_when_the_kept_results_table_is_dropped_and_says_so(
    unkept, tmp_path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = _copy(unkept[0], tmp_path)
    session_id, console = unkept[1], unkept[2]
    with Store.open(path) as store:
        refresh_results(store)
    _drop_kept_results(path)
    assert main(["verify", "--db", str(path)]) == EXIT_OK  # a cache gone: the record verifies
    out = capsys.readouterr().out
    assert f"session {session_id}: verified" in out and "the record verifies" in out
    assert "kept session results (table session_results) are missing" in out
    assert "the daemon keeps its result again" in out
    assert main(["verify", "--db", str(path), "--json"]) == EXIT_OK
    found = json.loads(capsys.readouterr().out)
    assert found["verified"] and all(chain["verified"] for chain in found["chains"])
    assert len(found["stored_results_missing"]) == 1
    with Store.open(path, read_only=True) as store:  # history still has its result, live
        (point,) = load_history(store, BEAM).points
    assert point.dose_per_MU_cGy == console["dose_per_MU_cGy"]
    with Store.open(path) as store:  # as the daemon opens it, then refreshes
        assert refresh_results(store) == 1
        assert store.session_results()[session_id][0] == evaluation_stamp()
    assert main(["verify", "--db", str(path)]) == EXIT_OK
    assert "note:" not in capsys.readouterr().out


def test_verify_names_the_closed_sessions_whose_kept_result_rows_are_absent(
    unkept, tmp_path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = _copy(unkept[0], tmp_path)
    session_id = unkept[1]
    assert main(["verify", str(session_id), "--db", str(path)]) == EXIT_OK
    out = capsys.readouterr().out
    assert f"closed session {session_id} has no kept result" in out
    assert "evaluated live from its recorded rows" in out and "the record verifies" in out


def test_a_result_is_kept_even_when_the_table_was_dropped_while_the_file_was_open(
    unkept, tmp_path
) -> None:
    path = _copy(unkept[0], tmp_path)
    session_id, console = unkept[1], unkept[2]
    with Store.open(path) as store:  # the daemon holds the file; someone drops the table
        _drop_kept_results(path)
        assert not store.keeps_results() and store.session_results() == {}
        assert refresh_results(store) == 1  # created again, then kept
        kept = ResultSummary.from_json(store.session_results()[session_id][1])
    assert kept.dose_per_MU_cGy == console["dose_per_MU_cGy"]


def test_a_kept_results_table_of_other_columns_is_a_missing_cache_and_is_set_aside_not_lost(
    unkept, tmp_path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = _copy(unkept[0], tmp_path)
    session_id, console = unkept[1], unkept[2]
    with sqlite3.connect(path) as db:  # someone replaces the cache with a table of their own
        db.execute("DROP TABLE session_results")
        db.execute("CREATE TABLE session_results (session_id INTEGER, note TEXT)")
        db.execute("INSERT INTO session_results VALUES (?, 'checked by hand')", (session_id,))
    assert main(["verify", "--db", str(path)]) == EXIT_OK  # the record itself verifies
    out = capsys.readouterr().out
    assert "the record verifies" in out
    assert "(table session_results) have columns other than chargebook's" in out
    with Store.open(path, read_only=True) as store:  # history evaluates it live
        assert store.results_table() == "other" and store.session_results() == {}
        (point,) = load_history(store, BEAM).points
    assert point.dose_per_MU_cGy == console["dose_per_MU_cGy"]
    with Store.open(path) as store:  # as the daemon opens it: set aside, made anew, refilled
        assert store.results_table() == "kept"
        assert refresh_results(store) == 1
        assert store.session_results()[session_id][0] == evaluation_stamp()
    with sqlite3.connect(path) as db:  # what the hand-made table held is still in the file
        assert db.execute("SELECT * FROM session_results_set_aside").fetchall() == [
            (session_id, "checked by hand")
        ]
    assert main(["verify", "--db", str(path)]) == EXIT_OK
    assert "note:" not in capsys.readouterr().out


def test_the_kept_results_of_some_sessions_are_read_alone(unkept, tmp_path) -> None:
    # history reads the results of one beam's sessions, not of the station's thousands
    path = _copy(unkept[0], tmp_path)
    session_id = unkept[1]
    with Store.open(path) as store:
        assert refresh_results(store) == 1
        every = store.session_results()
        assert set(every) == {session_id}
        assert store.session_results([session_id]) == every
        assert store.session_results(iter([session_id, session_id + 1])) == every
        assert store.session_results([session_id + 1]) == {}
        assert store.session_results([]) == {}


def test_a_kept_results_view_made_by_hand_is_set_aside_as_a_view(unkept, tmp_path) -> None:
    path = _copy(unkept[0], tmp_path)
    session_id = unkept[1]
    with sqlite3.connect(path) as db:  # a view of the same columns: nothing can be kept in it
        db.execute("DROP TABLE session_results")
        db.execute(
            "CREATE VIEW session_results AS SELECT id AS session_id, 'x' AS stamp, "
            "'{}' AS result_json, created_at AS evaluated_at FROM sessions"
        )
    with Store.open(path, read_only=True) as store:  # its rows bear no stamp of this code
        assert store.results_table() == "other"
        assert missing_results(store)[0].startswith("the kept session results (table ")
        (point,) = load_history(store, BEAM).points  # evaluated live
    assert point.dose_per_MU_cGy == unkept[2]["dose_per_MU_cGy"]
    with Store.open(path) as store:  # as the daemon opens it
        assert store.results_table() == "kept"
        assert refresh_results(store) == 1
        assert session_id in store.session_results()
    with sqlite3.connect(path) as db:  # the view is kept, under its new name
        kinds = dict(
            db.execute("SELECT name, type FROM sqlite_master WHERE name LIKE 'session_r%'")
        )
        assert kinds == {"session_results": "table", "session_results_set_aside": "view"}
        assert db.execute("SELECT count(*) FROM session_results_set_aside").fetchone()[0] >= 1
