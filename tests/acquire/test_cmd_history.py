"""`chargebook history --beam NAME`: table, terminal plot, JSON and HTML.

The station is a real SQLite file holding the invented example worksheet (Example Clinic
(fictional), DEMO-LA1 6 MV) recorded several times with every charge scaled by a known
factor, so that the deviation from the first session is 100 (s − 1) % (dose is proportional to
the charge in the TRS-398 formalism; k_pol and k_s depend only on charge ratios).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from chargebook.acquire.commands.cli import main
from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_OK
from chargebook.acquire.protocol import CAUTION
from chargebook.acquire.record.store import Store
from recorded_session import record_example_session

SCALES = (1.0, 1.004, 0.985)


@pytest.fixture
def station(tmp_path: Path) -> Path:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        for scale in SCALES:
            record_example_session(store, scale=scale)
    return path


def test_table_and_plot(station: Path, capsys) -> None:
    argv = ["history", "--beam", "6 MV", "--baseline", "first", "--db", str(station)]
    assert main(argv) == EXIT_OK
    out = capsys.readouterr().out
    rows = [line.split() for line in out.splitlines() if line[:1].isdigit()]
    assert [row[0] for row in rows] == ["1", "2", "3"]
    assert [row[6] for row in rows] == ["full", "full", "full"]  # kind: full calibration
    assert [row[10] for row in rows] == ["+0.00", "+0.40", "-1.50"]
    assert [row[-2] for row in rows] == ["yes", "yes", "NO"]  # ±1 %, the example's "annual"
    assert [row[-1] for row in rows] == ["none", "none", "outside_tolerance"]  # as `show` flags
    plot = [line for line in out.splitlines() if " % |" in line]
    assert sum(line.count("X") for line in plot) == 1
    assert sum(line.count("o") for line in plot) == 2
    assert out.rstrip().endswith(CAUTION)


def test_json_and_html(station: Path, tmp_path: Path, capsys) -> None:
    argv = ["history", "--beam", "6 MV", "--baseline", "first", "--db", str(station)]
    assert main([*argv, "--format", "json"]) == EXIT_OK
    data = json.loads(capsys.readouterr().out)
    deviations = [p["deviation_pct"] for p in data["points"]]
    assert deviations == pytest.approx([100.0 * (s - 1.0) for s in SCALES], abs=1e-9)
    assert data["baseline"] == "first"
    assert main([*argv, "--json"]) == EXIT_OK  # the shorthand every listing command has
    assert json.loads(capsys.readouterr().out) == data

    page = tmp_path / "history.html"
    assert main([*argv, "--format", "html", "-o", str(page)]) == EXIT_OK
    assert capsys.readouterr().err.strip() == f"wrote {page}"
    text = page.read_text(encoding="utf-8")
    assert text.count("<circle") == 3 and CAUTION in text


def test_every_format_goes_to_the_output_file_alone(station: Path, tmp_path: Path, capsys) -> None:
    argv = ["history", "--beam", "6 MV", "--db", str(station)]
    for output_format in ("text", "json"):
        target = tmp_path / f"history.{output_format}"
        assert main([*argv, "--format", output_format, "-o", str(target)]) == EXIT_OK
        assert capsys.readouterr().out == ""
        assert (
            target.read_text(encoding="utf-8")
            .rstrip()
            .endswith(CAUTION if output_format == "text" else "}")
        )


def test_the_old_html_option_still_writes_the_report_and_says_what_replaces_it(
    station: Path, tmp_path: Path, capsys
) -> None:
    page = tmp_path / "old.html"
    assert main(["history", "--beam", "6 MV", "--db", str(station), "--html", str(page)]) == 0
    assert "--format html -o FILE" in capsys.readouterr().err
    assert "<circle" in page.read_text(encoding="utf-8")


def test_bad_baseline_is_refused_in_words(station: Path, capsys) -> None:
    argv = ["history", "--beam", "6 MV", "--baseline", "yesterday", "--db", str(station)]
    assert main(argv) == EXIT_INVALID_INPUT
    err = capsys.readouterr().err
    assert "baseline = 'yesterday' is not known" in err and "session:ID" in err


def test_the_beam_is_required(station: Path, capsys) -> None:
    with pytest.raises(SystemExit) as caught:
        main(["history", "--db", str(station)])
    assert caught.value.code == 2
    assert "--beam" in capsys.readouterr().err


def test_a_beam_with_no_session_lists_the_beams_recorded_here(station: Path, capsys) -> None:
    assert main(["history", "--beam", "7 MV", "--db", str(station)]) == EXIT_OK
    out = capsys.readouterr().out
    assert "No session of beam '7 MV' matches. Beams recorded here: 6 MV." in out


def test_a_baseline_session_that_does_not_exist_is_said_so(station: Path, capsys) -> None:
    argv = ["history", "--beam", "6 MV", "--baseline", "session:99", "--db", str(station)]
    assert main(argv) == EXIT_INVALID_INPUT
    assert "baseline = 'session:99' is not recorded" in capsys.readouterr().err
