"""The HTML report: parsed back, its figures compared with the store and hand-computed physics.

The session is the invented example worksheet recorded through the Store API (Example Clinic
(fictional), DEMO-LA1 6 MV; not a real measurement).
"""

from __future__ import annotations

import itertools
import re
import statistics
from html.parser import HTMLParser
from pathlib import Path

import pytest
from chargebook.acquire.protocol import CAUTION, by_severity
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.review import record_review
from chargebook.acquire.record.store import Store
from chargebook.acquire.reports.data import load_record
from chargebook.acquire.reports.export import to_html
from recorded_session import SUPERSEDE_REASON, example_plan, record_example_session
from test_export import hand_dose_per_MU_cGy


class Report(HTMLParser):
    """Collects what a reader of the report sees: sections, keyed rows, plot points."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.section = ""
        self.sections: list[str] = []
        self.rows: dict[tuple[str, str], list[str]] = {}
        self.points: list[dict[str, str]] = []
        self.figures: list[str] = []
        self.tags: set[str] = set()
        self.links: list[str] = []
        self.cautions: list[str] = []
        self._row: list[str] | None = None
        self._key = ""
        self._text: list[str] | None = None
        self._in: str = ""

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        self.tags.add(tag)
        self.links += [v for k, v in attrs if k in ("src", "href") and v]
        if tag == "h2":
            self._in, self._text = "h2", []
        elif tag == "tr" and "data-key" in a:
            self._row, self._key = [], a["data-key"] or ""
        elif tag == "td" and self._row is not None:
            self._text = []
        elif tag == "circle":
            self.points.append({k: v or "" for k, v in attrs})
        elif tag == "figure" and "data-set-id" in a:
            self.figures.append(a["data-set-id"] or "")
        elif tag == "p" and "caution" in (a.get("class") or ""):
            self._in, self._text = "caution", []

    def handle_endtag(self, tag: str) -> None:
        if tag == "h2" and self._text is not None:
            self.section = "".join(self._text).strip()
            self.sections.append(self.section)
            self._text = None
        elif tag == "td" and self._row is not None and self._text is not None:
            self._row.append("".join(self._text).strip())
            self._text = None
        elif tag == "tr" and self._row is not None:
            self.rows[(self.section, self._key)] = self._row
            self._row = None
        elif tag == "p" and self._in == "caution" and self._text is not None:
            self.cautions.append("".join(self._text).strip())
            self._text, self._in = None, ""

    def handle_data(self, data: str) -> None:
        if self._text is not None:
            self._text.append(data)


@pytest.fixture
def report(tmp_path: Path) -> tuple[Report, Store]:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        record_example_session(store)
    store = Store.open(path, read_only=True)
    parsed = Report()
    parsed.feed(to_html(load_record(store, 1)))
    yield parsed, store
    store.close()


def test_report_is_one_self_contained_page_with_the_caution(report) -> None:
    parsed, _ = report
    assert "script" not in parsed.tags and "img" not in parsed.tags
    assert parsed.links == []  # nothing fetched from elsewhere: one printable file
    assert parsed.cautions == [CAUTION, CAUTION]
    # The result first; then the conditions, factors, sets, flags, budget, audit and review.
    assert parsed.sections == [
        "Result",
        "Session",
        "Calibration",
        "Reference conditions",
        "Deliveries",
        "Environment",
        "Correction factors",
        "Reading sets",
        "Readings",
        "Results in detail",
        "Flags",
        "Uncertainty budget",
        "Audit: redos, manual steps and status changes",
        "Review and sign-off",
    ]


def test_each_reading_set_has_a_plot_whose_points_are_the_stored_readings(report) -> None:
    parsed, store = report
    # Every set with a beam has a plot; the leakage set (one integration, beam off) is a row.
    beam_sets = [s for s in store.sets(1) if s.purpose != "leakage"]
    assert parsed.figures == [str(s.id) for s in beam_sets]
    plotted = {int(p["data-reading-id"]): p for p in parsed.points}
    readings = [r for r in store.readings(1) if r.set_id in {s.id for s in beam_sets}]
    assert sorted(plotted) == [r.id for r in readings]
    for reading in readings:
        point = plotted[reading.id]
        assert float(point["data-charge-nc"]) == reading.charge_nC
        assert point["data-settling"] == ("1" if reading.settling else "0")
        assert ("hollow" in point["class"]) == reading.settling


def test_results_shown_agree_with_hand_physics_and_the_recomputed_evaluation(report) -> None:
    parsed, store = report
    evaluation = load_record(store, 1).evaluation
    dose_per_MU = parsed.rows[("Results in detail", "dose_per_MU_cGy")][1]
    assert dose_per_MU == f"{evaluation.dose_per_MU_cGy:.4f}"
    assert float(dose_per_MU) == pytest.approx(hand_dose_per_MU_cGy(), abs=5e-5)
    # IAEA TRS-398 air density correction at 21.8 °C, 100.6 kPa, reference 20 °C, 101.325 kPa.
    k_TP = (273.2 + 21.8) / (273.2 + 20.0) * (101.325 / 100.6)
    assert parsed.rows[("Correction factors", "k_TP")][:3] == ["k_TP", f"{k_TP:.5f}", "measured"]
    assert parsed.rows[("Results in detail", "within_tolerance")][1] == "yes"
    expanded = parsed.rows[("Results in detail", "U_expanded_pct")][1]
    assert expanded == f"{evaluation.U_expanded_pct:.2f}"
    budget = [row for (section, _), row in parsed.rows.items() if section == "Uncertainty budget"]
    assert [row[0] for row in budget] == [c.component for c in evaluation.budget]


def test_environment_instrument_and_audit_are_shown(report) -> None:
    parsed, _ = report
    environment = [row for (s, _), row in parsed.rows.items() if s == "Environment"]
    assert [row[1:4] for row in environment] == [
        ["21.60", "100.600", "1006 hPa"],
        ["21.80", "100.600", "1006 hPa"],
    ]
    instrument = parsed.rows[("Session", "instrument")][1]
    assert instrument == "identity Bench, SIM-MODEL-1, SIM-EM-0001, 1.4, profile scpi-generic"
    audit = [row for (s, _), row in parsed.rows.items() if s.startswith("Audit")]
    # In words, steps numbered from 1 as the console numbers them: the opposite-polarity set
    # is the plan's third step (step_index 2).
    superseded = [row for row in audit if row[2] == "Step 3, opposite polarity: redone"]
    assert len(superseded) == 1
    assert superseded[0][3] == f"attempt 1 (set 3) superseded, reason: {SUPERSEDE_REASON}"
    manual = [row for row in audit if row[2] == "manual capture"]
    assert [row[1:] for row in manual] == [
        ["operator A", "manual capture", "-14.7770 nC in set 4 (opposite)"]
    ]
    assert ["session finished", "was open, reason: plan complete"] in [row[2:] for row in audit]
    # The bias turned by hand is a manual step; the remote one is routine and left out.
    bias = [row[1:] for row in audit if row[2] == "bias changed by hand"]
    assert bias == [["operator A", "bias changed by hand", "to -300 V"]]
    assert not any("step_index" in cell or "step_key" in cell for row in audit for cell in row)


def test_a_session_with_a_pending_factor_says_so(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        session_id = record_example_session(store, status="open")
        # A later session in which no environment was entered: k_TP and dose stay pending.
        second = store.create_session(
            store.session(session_id).metadata(),
            store.session(session_id).plan(),
            "trs398",
            "6 MV",
        )
        set_id = store.add_set(second, 1, "routine", "routine", 1, 300.0, 1)
        store.add_reading(second, set_id, 1, 1.0, 14.75, "auto", False, "ok")
        store.set_set_status(set_id, "accepted")
    with Store.open(path, read_only=True) as store:
        parsed = Report()
        parsed.feed(to_html(load_record(store, second)))
    assert parsed.rows[("Correction factors", "k_TP")][1:3] == ["pending", "pending"]
    assert parsed.rows[("Results in detail", "dose_per_MU_cGy")][1] == "pending"
    assert parsed.rows[("Results in detail", "M_raw_nC")][1] == "14.7500"
    assert parsed.rows[("Result", "dose_per_MU_cGy")][1] == "pending"
    assert parsed.rows[("Result", "verdict")][1].startswith("pending")


def test_set_plots_are_in_percent_of_the_set_mean_with_ticks_at_the_recorded_resolution(
    tmp_path: Path,
) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        record_example_session(store)
    with Store.open(path, read_only=True) as store:
        html = to_html(load_record(store, 1))
        routine = next(s for s in store.sets(1) if s.step_key == "routine")
        charges = {r.id: r.charge_nC for r in store.readings(1) if r.set_id == routine.id}
        used = [r.charge_nC for r in store.readings(1) if r.set_id == routine.id and not r.settling]
    parsed = Report()
    parsed.feed(html)
    mean = statistics.fmean(used)  # the Python standard library's mean, an independent oracle
    for point in (p for p in parsed.points if int(p["data-reading-id"]) in charges):
        expected = 100.0 * (charges[int(point["data-reading-id"])] - mean) / mean
        assert float(point["data-plotted"]) == pytest.approx(expected, abs=1e-9)
    figure = html[html.index(f'data-set-id="{routine.id}"') :]
    figure = figure[: figure.index("</figure>")]
    # The example's charges are written to 0.001 nC: 0.0068 % of a 14.75 nC mean, so the
    # tick labels carry three decimals and are at least 0.01 % apart.
    assert "readings recorded to 0.001 nC (0.0068 % of the mean)" in figure
    ticks = re.findall(r'class="tick" x="[\d.]+" y="[\d.]+" text-anchor="end" '
                       r'data-value="([^"]+)">([^<]+)<', figure)  # fmt: skip
    assert len(ticks) >= 2
    assert all(re.fullmatch(r"[+-]?\d+\.\d{3}", label) for _, label in ticks), ticks
    values = sorted(float(value) for value, _ in ticks)
    assert min(b - a for a, b in itertools.pairwise(values)) >= 0.01 - 1e-12


def test_the_report_states_the_mu_per_reading_of_each_set(report) -> None:
    parsed, store = report
    mu = example_plan().steps[1].mu_per_reading  # the example worksheet's monitor_units
    for reading_set in store.sets(1):
        row = parsed.rows[("Reading sets", f"set-{reading_set.id}")]
        expected = "beam off" if reading_set.purpose == "leakage" else f"{mu:g} MU"
        assert row[4] == expected
    assert parsed.rows[("Deliveries", "step-2")][:3] == [
        "Step 2, routine setting",
        "+300 V",
        "100 MU",
    ]


def test_the_result_comes_first_with_pass_or_fail_and_the_expanded_uncertainty(report) -> None:
    parsed, store = report
    evaluation = load_record(store, 1).evaluation
    assert parsed.sections[0] == "Result"
    assert parsed.rows[("Result", "dose_per_MU_cGy")] == [
        "dose per MU",
        f"{evaluation.dose_per_MU_cGy:.4f} cGy/MU",
    ]
    assert parsed.rows[("Result", "deviation_pct")][1] == f"{evaluation.deviation_pct:+.2f} %"
    # The example's tolerance is ±1 % (its worksheet), the deviation well inside it.
    assert parsed.rows[("Result", "verdict")][1] == "PASS: within the tolerance of ±1 % (entered)"
    assert parsed.rows[("Result", "U_expanded_pct")][1].startswith(
        f"{evaluation.U_expanded_pct:.2f} % (k = "
    )
    assert parsed.rows[("Review and sign-off", "reviewed-by")] == ["", "", ""]


def test_a_recorded_review_fills_the_review_block_and_the_result(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        session_id = record_example_session(store)
        # A second, named person approves with a comment, as `chargebook review` records it.
        record_review(store, session_id, "approve", "reviewer B", "k_s checked by hand")
    with Store.open(path, read_only=True) as store:
        record = load_record(store, session_id)
        reviewed = next(e for e in record.events if e.kind == EventKind.SESSION_REVIEWED)
        reviewed_at = reviewed.recorded_at
        parsed = Report()
        parsed.feed(to_html(record))
    stamp = reviewed_at[:19].replace("T", " ") + " UTC"
    assert parsed.rows[("Review and sign-off", "reviewed-by")] == ["reviewer B", stamp, ""]
    assert parsed.rows[("Review and sign-off", "measured-by")][0] == "operator A"
    assert parsed.rows[("Review and sign-off", "decision")] == ["approved: k_s checked by hand"]
    assert parsed.rows[("Result", "review")][1] == f"approved by reviewer B on {stamp}"


def test_a_failed_output_says_fail_first_and_lists_flags_worst_first(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    with Store.open(path) as store:
        # Every charge 3 % high: the dose per MU is 3 % above its expected value, outside the
        # example's ±1 % tolerance (invented data). No k_elec and no u(k_Q): two info flags,
        # which the evaluation raises before the warning.
        record_example_session(store, scale=1.03, k_elec=None, u_k_Q_pct=None)
    with Store.open(path, read_only=True) as store:
        record = load_record(store, 1)
        parsed = Report()
        parsed.feed(to_html(record))
    assert record.evaluation.within_tolerance is False
    assert parsed.rows[("Result", "verdict")][1].startswith("FAIL: outside the tolerance of ±1 %")
    shown = [row for (section, _), row in parsed.rows.items() if section == "Flags"]
    assert [f.severity for f in record.evaluation.flags] == ["info", "info", "warning"]
    assert [row[0] for row in shown] == ["! warning", "i info", "i info"]
    assert [row[1] for row in shown] == [f.message for f in by_severity(record.evaluation.flags)]


def test_the_certificates_own_coverage_factor_is_shown_and_used(tmp_path: Path) -> None:
    # Issue 12 item 8: a certificate at k = 2.4 (JCGM 100:2008 6.2.1: u = U/k).
    from chargebook.acquire.reports import sections

    with Store.open(tmp_path / "station.sqlite") as store:
        record_example_session(store, k_N_Dw=2.4)
        record = load_record(store, 1)
    labels = [row[0] for row in sections.calibration(record).rows]
    assert "U(N_D,w), k = 2.4" in labels
    u_N_Dw = record.evaluation.factors["N_Dw"].u_rel_pct
    assert u_N_Dw == pytest.approx(record.metadata["u_N_Dw_pct_k2"] / 2.4)


def test_the_report_states_nu_eff_k_and_the_monte_carlo_check(report) -> None:
    # Issue 12 items 6 and 7: U = k u_c with k from Student's t at ν_eff (JCGM 100:2008 G.4),
    # and the Monte Carlo interval beside it (JCGM 101:2008), the same numbers `correct` prints.
    from chargebook.acquire.reports import sections

    parsed, store = report
    record = load_record(store, 1)
    evaluation = record.evaluation
    assert (
        parsed.rows[("Results in detail", "coverage_factor")][1]
        == f"{evaluation.coverage_factor:.3f}"
    )
    # The example's budget is Type B dominant: ν_eff is large and k close to 1.96 (JCGM 100 G.2).
    assert parsed.rows[("Results in detail", "effective_dof")][1] == "above 1000"
    assert evaluation.coverage_factor == pytest.approx(1.96, abs=0.005)
    note = sections.budget(record).note
    assert evaluation.monte_carlo().note in note
    # The result, first, states U with the same k and ν_eff.
    assert parsed.rows[("Result", "U_expanded_pct")][1] == (
        f"{evaluation.U_expanded_pct:.2f} % (k = {evaluation.coverage_factor:.2f}, "
        "ν_eff = above 1000, coverage probability 95 %)"
    )
