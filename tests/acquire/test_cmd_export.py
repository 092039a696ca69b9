"""`chargebook export SESSION --format csv|json|html`: files written whole, read back.

The station is a real SQLite file holding the invented example worksheet (Example Clinic
(fictional), DEMO-LA1 6 MV) recorded through the Store API.
"""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_OK
from chargebook.acquire.record.store import Store
from chargebook.acquire.reports.export import CSV_COLUMNS
from recorded_session import recorded_station
from test_export_html import Report


@pytest.fixture
def station(tmp_path: Path) -> Path:
    return recorded_station(tmp_path)


def test_csv_to_stdout(station: Path, capsys) -> None:
    assert main(["export", "1", "--format", "csv", "--db", str(station)]) == EXIT_OK
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert tuple(rows[0]) == CSV_COLUMNS
    with Store.open(station, read_only=True) as store:
        assert [float(r["charge_nC"]) for r in rows] == [r.charge_nC for r in store.readings(1)]


def test_html_to_a_file(station: Path, tmp_path: Path, capsys) -> None:
    target = tmp_path / "report.html"
    argv = ["export", "1", "--format", "html", "-o", str(target), "--db", str(station)]
    assert main(argv) == EXIT_OK
    assert f"wrote {target}" in capsys.readouterr().err
    parsed = Report()
    parsed.feed(target.read_text(encoding="utf-8"))
    assert len(parsed.figures) == 4  # one per set with a beam (the leakage set is a row)
    assert parsed.rows[("Results in detail", "within_tolerance")][1] == "yes"
    assert list(tmp_path.glob(".*partial")) == []


def test_json_with_traffic(station: Path, tmp_path: Path) -> None:
    target = tmp_path / "session.json"
    argv = ["export", "1", "--format", "json", "--traffic", "-o", str(target)]
    assert main([*argv, "--db", str(station)]) == EXIT_OK
    data = json.loads(target.read_text(encoding="utf-8"))
    assert [t["line"] for t in data["traffic"]] == [
        "*IDN?\n",
        "Bench,SIM-MODEL-1,SIM-EM-0001,1.4\r\n",
    ]


def test_a_format_must_be_chosen_from_the_list(station: Path, capsys) -> None:
    with pytest.raises(SystemExit) as caught:
        main(["export", "1", "--format", "pdf", "--db", str(station)])
    assert caught.value.code == 2
    assert "invalid choice: 'pdf'" in capsys.readouterr().err


def test_an_unwritable_target_leaves_nothing_behind(station: Path, tmp_path: Path, capsys) -> None:
    target = tmp_path / "missing-folder" / "report.html"
    argv = ["export", "1", "--format", "html", "-o", str(target), "--db", str(station)]
    assert main(argv) == EXIT_FAILURE
    assert f"cannot write {target}" in capsys.readouterr().err
    assert not target.parent.exists()
