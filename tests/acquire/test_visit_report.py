"""A calibration visit's summary: `show --visit`, `export --visit` and the printed report.

The visit is of the invented Example Clinic's DEMO-LA1 (fictional): beam "6 MV" measured in
the example worksheet's session (recorded through the Store API), "10 MV" aborted, "9 MeV"
skipped. The printed report is checked as the session's is (tests/acquire/test_report_print.py):
headless Chromium prints it, pdftotext reads every page back.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.record import visits
from chargebook.acquire.record.review import record_visit_review
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.evaluation import evaluate_session
from recorded_session import OPERATOR, record_example_session
from test_report_print import printed_pages

REVIEWER = "reviewer B"


@pytest.fixture
def station(tmp_path: Path) -> tuple[Path, float]:
    """Return the station file and the 6 MV beam's dose per MU (as its session evaluates)."""
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        visit_id = visits.create_visit(store, "DEMO-LA1", {"operator": OPERATOR}, OPERATOR)
        beams = {
            name: visits.add_beam(store, visit_id, name, plan, {}, OPERATOR)
            for name, plan in (("6 MV", "default"), ("10 MV", "default"), ("9 MeV", "default"))
        }
        measured = record_example_session(store)
        visits.link_session(store, visit_id, beams["6 MV"], measured, OPERATOR)
        aborted = record_example_session(store, status="aborted")
        visits.link_session(store, visit_id, beams["10 MV"], aborted, OPERATOR)
        visits.mark_beam(store, visit_id, beams["9 MeV"], "skipped", "no applicator", OPERATOR)
        visits.close_visit(store, visit_id, None, OPERATOR)
        record_visit_review(store, visit_id, "approve", REVIEWER, "6 MV within tolerance")
        dose_per_MU = evaluate_session(store, measured).evaluation.dose_per_MU_cGy
    return path, dose_per_MU


def test_show_visit_prints_the_result_by_beam_first(station, capsys) -> None:
    path, dose_per_MU = station
    assert main(["show", "--visit", "1", "--db", str(path)]) == EXIT_OK
    out = capsys.readouterr().out
    assert out.startswith("Visit 1: result by beam")
    six = next(line for line in out.splitlines() if line.startswith("1  6 MV"))
    assert f"{dose_per_MU:.4f}" in six and "PASS" in six
    assert re.search(r"^2\s+10 MV\s+default\s+unfinished", out, re.M)
    assert re.search(r"^3\s+9 MeV\s+default\s+skipped: no applicator", out, re.M)
    assert f"approved by {REVIEWER}" in out
    # Each measured beam's factors, with their states, after the result
    assert re.search(r"^Beam 1, 6 MV \(session 1, default, \d+ MU per reading\)", out, re.M)
    assert out.index("correction factors") > out.index("result by beam")


def test_show_visit_json_has_each_beam_with_its_numbers(station, capsys) -> None:
    path, dose_per_MU = station
    assert main(["show", "--visit", "1", "--json", "--db", str(path)]) == EXIT_OK
    found = json.loads(capsys.readouterr().out)
    assert [b["status"] for b in found["beams"]] == ["measured", "unfinished", "skipped"]
    assert found["beams"][0]["dose_per_MU_cGy"] == pytest.approx(dose_per_MU)
    assert found["beams"][0]["verdict"] == "pass"
    assert found["review"]["status"] == "approved"


def test_show_needs_a_session_or_a_visit_and_names_a_missing_visit(station, capsys) -> None:
    path, _ = station
    assert main(["show", "--db", str(path)]) == EXIT_INVALID_INPUT
    assert "SESSION is missing" in capsys.readouterr().err
    assert main(["show", "1", "--visit", "1", "--db", str(path)]) == EXIT_INVALID_INPUT
    assert "--visit = 1 is given with a session" in capsys.readouterr().err
    assert main(["show", "--visit", "7", "--db", str(path)]) == EXIT_INVALID_INPUT
    assert "no visit with id 7" in capsys.readouterr().err


@pytest.mark.e2e
def test_every_printed_page_of_the_visit_report_carries_the_visit_id(
    station, tmp_path: Path
) -> None:
    path, dose_per_MU = station
    target = tmp_path / "visit.html"
    args = ["export", "--visit", "1", "--format", "html", "-o", str(target), "--db", str(path)]
    assert main(args) == EXIT_OK
    html = target.read_text(encoding="utf-8")
    pages = printed_pages(html, tmp_path, "A4", "chargebook visit 1 ")
    assert f"{dose_per_MU:.4f}" in pages[0] and "PASS" in pages[0]
    assert "Reviewed by" in pages[-1] and REVIEWER in pages[-1]


def test_a_visit_reviewed_by_its_operator_says_so(tmp_path: Path, capsys) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        visit_id = visits.create_visit(store, "DEMO-LA1", {"operator": OPERATOR}, OPERATOR)
        beam = visits.add_beam(store, visit_id, "6 MV", "default", {}, OPERATOR)
        visits.link_session(store, visit_id, beam, record_example_session(store), OPERATOR)
        visits.close_visit(store, visit_id, None, OPERATOR)
        record_visit_review(store, visit_id, "approve", OPERATOR, "fine", allow_self_review=True)
    assert main(["show", "--visit", "1", "--db", str(path)]) == EXIT_OK
    out = capsys.readouterr().out
    assert f"approved by {OPERATOR} (self-review, allowed by --allow-self-review)" in out
    assert f"by {OPERATOR} (self-review, allowed by --allow-self-review); comment: fine" in out
