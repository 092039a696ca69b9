"""History by register beam (issue 14 item 5): `--beam` takes the registers' name or id, close
matches are listed when nothing matches, points are placed by date with their expanded
uncertainty, the tolerance and action levels are drawn, and output checks are told apart.

A real SQLite file with the invented demo registers (Example Clinic (fictional)) and the
invented example sessions of recorded_session. Check values are identities with the stored
evaluation and the registers.
"""

from __future__ import annotations

import datetime
import re
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.commands.demo_data import add_demo_registers
from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.record.store import Store
from chargebook.acquire.reports.history import load_history
from chargebook.acquire.session.carried import carried_metadata
from chargebook.acquire.session.evaluation import evaluate_session
from chargebook.acquire.session.register_rows import find_beam, select
from chargebook.corrections.errors import InputError
from recorded_session import example_metadata, record_example_session
from test_carried_start import MONTHLY, TODAY, StoreClock, record_output_check


@pytest.fixture
def station(tmp_path: Path) -> Path:
    """Two typed full calibrations of DEMO-LA1 6 MV, one of DEMO-LA2, and an output check
    that named the register beam."""
    path = tmp_path / "station.sqlite"
    with Store.open(path, now=StoreClock()) as store:
        ids = add_demo_registers(store, actor="physicist C", today=datetime.date(2026, 12, 3))
        record_example_session(store)
        record_example_session(store, scale=1.004)
        record_example_session(store, treatment_machine="DEMO-LA2")
        picked = select(
            store,
            {"beam": ids["la1_6mv"], "chamber": ids["ch1"], "electrometer": ids["em1"]},
            on=datetime.date(2026, 12, 3),
        )
        named = example_metadata(registers=picked.ids(), register_copy=picked.copy())
        record_output_check(store, carried_metadata(store, named, MONTHLY, TODAY))
    return path


def test_the_register_beam_gathers_its_sessions_typed_or_named(station: Path) -> None:
    with Store.open(station, read_only=True) as store:
        by_name = load_history(store, "6mv")
        by_id = load_history(store, str(find_beam(store, "DEMO-LA1 6 MV").id))
        evaluations = [evaluate_session(store, p.session_id).evaluation for p in by_name.points]
    assert by_name.register_beam == by_id.register_beam
    assert by_name.register_beam[1] == "DEMO-LA1 6 MV"
    assert [p.session_id for p in by_name.points] == [1, 2, 4]  # not DEMO-LA2's session 3
    assert [p.kind for p in by_name.points][-1] == "output check"
    assert by_name.points[-1].dose_per_MU_cGy is not None  # k_pol and k_s carried
    assert by_name.action_pct == 3.0  # the register beam's action level
    assert [p.U_expanded_pct for p in by_name.points] == [e.U_expanded_pct for e in evaluations]


def test_a_typed_beam_is_found_by_its_machine_and_beam_named_as_the_registers_name_one(
    tmp_path: Path, capsys
) -> None:
    """The demo registers hold DEMO-LA1's 6 MV and 10 MeV, not 10 MV; a session typed 10 MV
    on DEMO-LA1 is found by "DEMO-LA1 10 MV", not refused with "the closest being 10 MeV"."""
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        add_demo_registers(store, actor="physicist C", today=datetime.date(2026, 12, 3))
        record_example_session(store, beam="10 MV")
        record_example_session(store, beam="10 MV", treatment_machine="DEMO-LA2")
    with Store.open(path, read_only=True) as store:
        found = load_history(store, "demo-la1  10 MV")  # case and spaces aside
    assert (found.beam, found.machine) == ("10 MV", "DEMO-LA1")
    assert [p.session_id for p in found.points] == [1]  # not DEMO-LA2's session 2
    assert main(["history", "--beam", "DEMO-LA1 10 MV", "--db", str(path)]) == EXIT_OK
    assert "Output history: 10 MV on DEMO-LA1" in capsys.readouterr().out


def test_close_matches_are_listed_when_nothing_matches(station: Path, capsys) -> None:
    with Store.open(station, read_only=True) as store, pytest.raises(InputError) as refused:
        load_history(store, "DEMO-LA1 7 MV")
    assert "a beam of the registers, the closest being DEMO-LA1 6 MV" in str(refused.value)
    assert main(["history", "--beam", "7 MV", "--db", str(station)]) == EXIT_INVALID_INPUT
    assert "is not a beam of the registers" in capsys.readouterr().err


def test_the_plot_draws_bars_action_lines_dates_and_marks_output_checks(
    station: Path, capsys
) -> None:
    assert main(["history", "--beam", "DEMO-LA1 6 MV", "--db", str(station)]) == EXIT_OK
    shown = capsys.readouterr().out
    assert "Output history: 6 MV on DEMO-LA1" in shown
    assert re.search(r"\+3\.00 % \| +#", shown) and re.search(r"-3\.00 % \| +#", shown)
    assert "|" in "".join(line.split("|", 1)[1] for line in shown.splitlines() if " % |" in line)
    assert "# action level ±3 %" in shown and "| expanded uncertainty" in shown
    assert "4*" in shown  # the output check, marked
    with Store.open(station, read_only=True) as store:
        dates = [store.session(n).created_at[5:10] for n in (1, 2, 4)]
    assert any(line.split() == dates for line in shown.splitlines())  # under each column
    out = Path(station.parent / "history.html")
    assert main(["history", "--beam", "6 MV", "--format", "html", "-o", str(out),
                 "--db", str(station)]) == EXIT_OK  # fmt: skip
    page = out.read_text(encoding="utf-8")
    assert page.count('class="error-bar"') == 3
    assert page.count('stroke-dasharray="4 3"') == 2  # the two action lines
    assert "action +3 %" in page and 'data-kind="output check"' in page
    assert "date (days from the first session)" in page


def test_show_and_the_html_report_read_the_action_level_the_registers_copied(
    station: Path, tmp_path: Path, capsys
) -> None:
    # Session 4 named the register beam, whose row holds action_pct = 3 (the invented demo
    # registers); session 1 was typed before the registers and sets no action level.
    assert main(["show", "4", "--db", str(station)]) == EXIT_OK
    shown = capsys.readouterr().out
    assert re.search(r"action level \(%\)\s+±3 %", shown)
    page = tmp_path / "4.html"
    assert main(["export", "4", "--format", "html", "-o", str(page), "--db", str(station)]) == 0
    html = page.read_text(encoding="utf-8")
    assert "±3 %" in html and "action level not set" not in html
    assert "not set in this record" not in html
    assert main(["show", "1", "--db", str(station)]) == EXIT_OK
    assert re.search(r"action level \(%\)\s+not set in this record", capsys.readouterr().out)


@pytest.mark.parametrize(
    ("metadata", "expected"),
    [
        ({"register_copy": {"beam": {"fields": {"action_pct": 3}}}}, 3.0),
        ({"action_level_pct": 2.5, "register_copy": {"beam": {"fields": {"action_pct": 3}}}}, 2.5),
        ({"register_copy": {"beam": {"fields": {}}}}, None),
        ({}, None),
    ],
)
def test_a_typed_action_level_comes_before_the_register_copy(metadata: dict, expected) -> None:
    from chargebook.acquire.session.metadata import action_level_pct

    assert action_level_pct(metadata) == expected
