"""Output history of a beam: dose per MU by session, against a baseline and the tolerance.

Sessions are the invented example worksheet (Example Clinic (fictional), DEMO-LA1 6 MV) recorded
through the Store API, with every charge scaled by a known factor. In the TRS-398 formalism
D_w = M_raw · k_TP · k_pol · k_s · k_elec · N_D,w · k_Q, and k_pol and k_s depend only on ratios
of charges, so scaling every charge by s scales the dose by s: the deviation of a session from
an unscaled one is 100 (s − 1) % exactly.
"""

from __future__ import annotations

from html.parser import HTMLParser

import pytest
from chargebook.acquire.record.store import Store
from chargebook.acquire.reports.data import load_record
from chargebook.acquire.reports.history import history_table, load_history, parse_baseline
from chargebook.acquire.reports.html import history_html
from chargebook.acquire.reports.text import deviation_plot
from chargebook.corrections.errors import InputError
from recorded_session import example_metadata, example_plan, record_example_session

SCALES = (1.0, 1.008, 0.975, 1.0)
#: The example's tolerance is "annual": 1 % (AAPM TG-142, from memory; see docs/physics.md).
TOLERANCE_PCT = 1.0


@pytest.fixture(scope="module")
def store(tmp_path_factory: pytest.TempPathFactory) -> Store:
    """One station for the module: every test only reads it."""
    path = tmp_path_factory.mktemp("history") / "station.sqlite"
    with Store.open(path) as writer:
        ids = [record_example_session(writer, scale=s) for s in SCALES]
        record_example_session(writer, scale=1.5, status="aborted")
        record_example_session(writer, scale=1.0, replay_of=ids[0])
        record_example_session(writer, beam="10 MV", k_Q=0.98)
        record_example_session(writer, treatment_machine="DEMO-LA2", scale=1.003)
    reader = Store.open(path, read_only=True)
    yield reader
    reader.close()


def _deviations(history) -> list[float]:
    return [p.deviation_pct for p in history.points]


def test_finished_sessions_of_the_beam_are_listed_in_order(store: Store) -> None:
    history = load_history(store, "6 mv")
    assert [p.session_id for p in history.points] == [1, 2, 3, 4, 8]
    assert {p.beam for p in history.points} == {"6 MV"}
    assert [p.machine for p in history.points] == ["DEMO-LA1"] * 4 + ["DEMO-LA2"]
    on_la1 = load_history(store, "6 MV", machine="demo-la1")
    assert [p.session_id for p in on_la1.points] == [1, 2, 3, 4]


def test_deviation_from_the_first_session_is_the_charge_scale(store: Store) -> None:
    history = load_history(store, "6 MV", machine="DEMO-LA1", baseline="first")
    expected = [100.0 * (s - 1.0) for s in SCALES]
    assert _deviations(history) == pytest.approx(expected, abs=1e-9)
    assert [p.within_tolerance for p in history.points] == [True, True, False, True]
    assert history.tolerance_pct == TOLERANCE_PCT
    first = load_record(store, 1).evaluation.dose_per_MU_cGy
    assert history.baseline_cGy_per_MU == first
    assert "the first session, 1" in history.baseline_label


def test_baseline_expected_is_each_sessions_own_deviation(store: Store) -> None:
    history = load_history(store, "6 MV", machine="DEMO-LA1")
    for point in history.points:
        evaluation = load_record(store, point.session_id).evaluation
        assert point.deviation_pct == evaluation.deviation_pct
        assert point.dose_per_MU_cGy == evaluation.dose_per_MU_cGy
        assert point.expected_cGy_per_MU == 0.8  # the example worksheet's expected output


def test_other_baselines(store: Store) -> None:
    second = load_history(store, "6 MV", machine="DEMO-LA1", baseline="session:2")
    assert _deviations(second) == pytest.approx([100.0 * (s / 1.008 - 1) for s in SCALES])
    mean = load_history(store, "6 MV", machine="DEMO-LA1", baseline="mean")
    assert sum(_deviations(mean)) == pytest.approx(0.0, abs=1e-9)
    number = load_history(store, "6 MV", machine="DEMO-LA1", baseline="0.8")
    expected = load_history(store, "6 MV", machine="DEMO-LA1", baseline="expected")
    assert _deviations(number) == pytest.approx(_deviations(expected), abs=1e-12)


def test_all_includes_aborted_sessions_and_replays(store: Store) -> None:
    history = load_history(store, "6 MV", machine="DEMO-LA1", include_all=True)
    assert [(p.session_id, p.status) for p in history.points] == [
        (1, "finished"),
        (2, "finished"),
        (3, "finished"),
        (4, "finished"),
        (5, "aborted"),
        (6, "finished"),
    ]


def test_all_marks_a_replay_and_its_baselines_count_only_what_a_plain_history_lists(
    store: Store,
) -> None:
    # Session 6 replays session 1 (same charges: the same dose); session 5 was aborted with
    # every charge 1.5 times. Counting them would move the mean by 8.7 %, and count session 1
    # twice: the mean and first baselines of --all are those of the plain history.
    shown = load_history(store, "6 MV", machine="DEMO-LA1", include_all=True, baseline="mean")
    plain = load_history(store, "6 MV", machine="DEMO-LA1", baseline="mean")
    assert shown.baseline_cGy_per_MU == plain.baseline_cGy_per_MU
    assert "replays and open, aborted or rejected ones not counted" in shown.baseline_label
    assert "not counted" not in plain.baseline_label
    replay = next(p for p in shown.points if p.session_id == 6)
    assert replay.replay_of == 1 and replay.shown_status == "finished, replay of 1"
    statuses = {row[0]: row[3] for row in history_table(shown).rows}
    assert statuses["6"] == "finished, replay of 1" and statuses["1"] == "finished"
    first = load_history(store, "6 MV", machine="DEMO-LA1", include_all=True, baseline="first")
    assert first.baseline_cGy_per_MU == load_record(store, 1).evaluation.dose_per_MU_cGy


def test_a_mean_of_all_with_no_session_it_counts_says_what_it_counts(tmp_path) -> None:
    # --all lists an aborted session with a dose; the mean counts none, and says why.
    path = tmp_path / "station.sqlite"
    with Store.open(path) as writer:
        record_example_session(writer, scale=1.0, status="aborted")
    with Store.open(path, read_only=True) as reader, pytest.raises(InputError) as refused:
        load_history(reader, "6 MV", include_all=True, baseline="mean")
    assert "counts only finished, unrejected sessions that are not replays" in str(refused.value)


@pytest.mark.parametrize(
    ("text", "words"),
    [
        ("last", "is not known"),
        ("session:x", "is not a session id"),
        ("50", "outside the allowed range 0.01 to 10 cGy/MU"),
    ],
)
def test_bad_baselines_are_refused_naming_the_option(text: str, words: str) -> None:
    with pytest.raises(InputError) as caught:
        parse_baseline(text)
    assert caught.value.field == "baseline" and words in str(caught.value)


def test_a_baseline_session_that_does_not_exist_is_refused(store: Store) -> None:
    with pytest.raises(InputError, match="baseline = 'session:99'"):
        load_history(store, "6 MV", baseline="session:99")


def test_no_matching_session_gives_an_empty_history(store: Store) -> None:
    history = load_history(store, "18 MV")
    assert history.points == ()
    assert history_table(history).note.startswith("No session of beam '18 MV' matches.")
    assert "6 MV" in history.known_beams  # what the station does hold, said beside it


def test_terminal_plot_puts_each_session_in_its_column_and_marks_the_outlier() -> None:
    plot = deviation_plot([0.0, 0.8, -2.5, None], 1.0, ["1", "2", "3", "4"])
    lines = plot.splitlines()
    grid = [line.split("|", 1)[1] for line in lines if "|" in line]
    levels = [float(line.split("%")[0]) for line in lines if "|" in line]
    columns = [[row[3 * i : 3 * i + 3].strip() for row in grid] for i in range(4)]
    for column, deviation, mark in zip(columns[:3], [0.0, 0.8, -2.5], ["o", "o", "X"], strict=True):
        hits = [level for level, cell in zip(levels, column, strict=True) if cell == mark]
        assert len(hits) == 1
        assert abs(hits[0] - deviation) <= (levels[0] - levels[1]) / 2
    assert columns[3].count("?") == 1
    tolerance_rows = [lv for lv, row in zip(levels, grid, strict=True) if "=" in row]
    assert tolerance_rows and all(abs(abs(lv) - 1.0) < 0.4 for lv in tolerance_rows)


def test_terminal_plot_marks_points_beyond_its_edges() -> None:
    lines = deviation_plot([17.0, -0.2, -30.0], 1.0, ["7", "8", "9"]).splitlines()
    grid = [line.split("|", 1)[1] for line in lines if "|" in line]
    assert grid[0].split() == ["^"] and grid[-1].split() == ["v"]
    assert sum(row.count("o") for row in grid) == 1


class Points(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.points: list[dict[str, str]] = []
        self.bands: list[dict[str, str]] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "circle":
            self.points.append({k: v or "" for k, v in attrs})
        elif tag == "rect":
            self.bands.append({k: v or "" for k, v in attrs})


def test_html_history_plots_each_session_against_the_band(store: Store) -> None:
    history = load_history(store, "6 MV", machine="DEMO-LA1", baseline="first")
    parsed = Points()
    parsed.feed(history_html(history, history_table(history), "generated now"))
    assert [int(p["data-session-id"]) for p in parsed.points] == [1, 2, 3, 4]
    shown = [float(p["data-deviation-pct"]) for p in parsed.points]
    assert shown == _deviations(history)
    assert ["alarm" in p["class"] for p in parsed.points] == [False, False, True, False]
    (band,) = parsed.bands
    assert (float(band["data-low"]), float(band["data-high"])) == (-1.0, 1.0)


def test_a_session_whose_names_are_not_all_text_is_matched_on_its_decoded_metadata(
    tmp_path,
) -> None:
    # The listing reads the names with SQLite's JSON functions and leaves out a session whose
    # names are not all text; history decodes that one's metadata and lists it all the same.
    path = tmp_path / "station.sqlite"
    with Store.open(path) as writer:
        kept = record_example_session(writer)
        meta = {**example_metadata(), "operator": ["A", "B"]}  # written by another program
        odd = writer.create_session(meta, example_plan().to_dict(), meta["convention"], "6 MV")
        writer.set_session_status(odd, "finished")
        assert [row.names is None for row in writer.listed_sessions()] == [False, True]
    with Store.open(path, read_only=True) as reader:
        points = load_history(reader, "6 MV", machine="DEMO-LA1").points
    assert [(p.session_id, p.machine, p.beam) for p in points] == [
        (kept, "DEMO-LA1", "6 MV"),
        (odd, "DEMO-LA1", "6 MV"),
    ]
    assert points[0].dose_per_MU_cGy is not None
    assert points[1].dose_per_MU_cGy is None and "operator" in (points[1].problem or "")
