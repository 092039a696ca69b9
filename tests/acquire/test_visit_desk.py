"""The daemon's calibration visit over the real engine and a real SQLite file (issue 15 item 1).

The beams are the invented demo clinic's (Example Clinic (fictional), DEMO-LA1): the visit
reuses the engine's session lifecycle, one session per beam, and carries the air data from
beam to beam only when the operator confirms them in time.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.engine.engine import Engine
from chargebook.acquire.engine.states import IllegalTransition
from chargebook.acquire.engine.visit_desk import VisitDesk
from chargebook.acquire.protocol import EngineState
from chargebook.acquire.record import visits
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.visit_rules import CONFIRMED, DEFAULT_AIR_MAX_AGE_MIN
from chargebook.corrections.errors import InputError

OPERATOR = "operator A"


class WallClock:
    """The store's clock, moved by hand."""

    def __init__(self) -> None:
        self.now = datetime(2026, 12, 3, 8, 0, tzinfo=UTC)

    def __call__(self) -> datetime:
        return self.now


def _desk(path: Path, clock: WallClock) -> VisitDesk:
    engine = Engine(Store.open(path, now=clock))
    desk = VisitDesk(engine)
    desk.restore()
    return desk


def _beam(name: str, **extra) -> dict:
    return {**demo_metadata(), "beam": name, **extra}


@pytest.fixture
def clock() -> WallClock:
    return WallClock()


@pytest.fixture
def desk(tmp_path: Path, clock: WallClock):
    opened = _desk(tmp_path / "station.sqlite", clock)
    opened.start("DEMO-LA1", {"operator": OPERATOR}, OPERATOR)
    opened.add_beam(_beam("6 MV"), "default", OPERATOR)
    opened.add_beam(_beam("10 MV"), "default", OPERATOR)
    yield opened
    opened.store.close()


def test_a_beam_starts_the_engines_session_with_its_plan_and_metadata(desk: VisitDesk) -> None:
    session_id = desk.start_beam("10 MV", OPERATOR)
    engine = desk.engine
    assert engine.session_id == session_id
    assert engine.plan.name == "default"
    assert engine.metadata["beam"] == "10 MV"
    assert engine.metadata["treatment_machine"] == "DEMO-LA1"
    shown = desk.snapshot()
    assert [b["status"] for b in shown["beams"]] == ["planned", "measuring"]
    assert shown["beams"][1]["session"] == session_id


def test_a_beam_of_another_machine_or_plan_is_refused_by_name(desk: VisitDesk) -> None:
    with pytest.raises(InputError) as refused:
        desk.add_beam(_beam("15 MV", treatment_machine="DEMO-LA2"), "default", OPERATOR)
    assert refused.value.field == "treatment_machine"
    with pytest.raises(InputError) as refused:
        desk.add_beam(_beam("15 MV"), "no-such-plan", OPERATOR)
    with pytest.raises(InputError) as refused:
        desk.add_beam(_beam("6 mv"), "default", OPERATOR)
    assert refused.value.field == "beam"


def test_an_aborted_beam_is_unfinished_with_its_reason_and_may_be_measured_again(
    desk: VisitDesk,
) -> None:
    first = desk.start_beam("6 MV", OPERATOR)
    desk.engine.abort("chamber cable damaged", confirm=True, actor=OPERATOR)
    desk.engine.close(actor=OPERATOR)
    beam = desk.snapshot()["beams"][0]
    assert (beam["status"], beam["reason"]) == ("unfinished", "chamber cable damaged")
    second = desk.start_beam("6 MV", OPERATOR)
    assert desk.snapshot()["beams"][0]["sessions"] == [first, second]


def test_a_skipped_beam_keeps_its_reason_and_the_visit_closes_with_it(desk: VisitDesk) -> None:
    desk.skip_beam("10 MV", "beam held for service", OPERATOR)
    with pytest.raises(InputError) as refused:
        desk.close(None, OPERATOR)
    assert refused.value.field == "reason"
    desk.close("6 MV left for tomorrow", OPERATOR)
    shown = desk.snapshot()
    assert shown["status"] == "closed"
    assert [(b["status"], b["reason"]) for b in shown["beams"]] == [
        ("unfinished", "the visit was closed: 6 MV left for tomorrow"),
        ("skipped", "beam held for service"),
    ]
    with pytest.raises(IllegalTransition, match="no visit is open"):
        desk.add_beam(_beam("15 MV"), "default", OPERATOR)


def test_the_open_visit_is_taken_up_again_after_a_restart(
    desk: VisitDesk, tmp_path: Path, clock: WallClock
) -> None:
    session_id = desk.start_beam("6 MV", OPERATOR)
    desk.store.close()
    again = _desk(tmp_path / "station.sqlite", clock)
    try:
        again.engine.restore()
        assert again.visit_id == desk.visit_id
        assert again.snapshot()["beams"][0]["session"] == session_id
        assert again.engine.session_id == session_id
    finally:
        again.store.close()
    desk.store = again.store  # closed above; the fixture closes it again harmlessly


def test_air_is_carried_to_the_next_beam_only_when_confirmed_and_names_its_reading(
    desk: VisitDesk, clock: WallClock
) -> None:
    engine = desk.engine
    first = desk.start_beam("6 MV", OPERATOR)
    engine.set_environment(21.4, 1008.0, "hPa", source="barometer", actor=OPERATOR)
    read_at = engine.store.environment(first)[-1].recorded_at
    engine.stop("first beam done for this test", actor=OPERATOR)
    engine.close(actor=OPERATOR)
    clock.now += timedelta(minutes=12)
    second = desk.start_beam("10 MV", OPERATOR)
    assert engine.store.environment(second) == []  # nothing carried silently
    assert engine.refusal("step.arm") is not None
    desk.confirm_air(OPERATOR)
    entry = engine.store.environment(second)[-1]
    assert (entry.temperature_C, entry.pressure_entered, entry.pressure_unit) == (
        21.4,
        1008.0,
        "hPa",
    )
    assert entry.source.startswith(CONFIRMED)
    assert read_at in entry.source and "12 min" in entry.source
    assert desk.snapshot()["air"]["read_at"] == read_at  # the age counts from the reading


def test_a_confirmation_older_than_the_set_age_is_refused_by_name(
    desk: VisitDesk, clock: WallClock
) -> None:
    engine = desk.engine
    desk.start_beam("6 MV", OPERATOR)
    engine.set_environment(21.4, 101.1, actor=OPERATOR)
    engine.stop("first beam done for this test", actor=OPERATOR)
    engine.close(actor=OPERATOR)
    # 30 min, common practice: the visit's default age limit.
    assert DEFAULT_AIR_MAX_AGE_MIN == 30.0
    clock.now += timedelta(minutes=31)
    second = desk.start_beam("10 MV", OPERATOR)
    with pytest.raises(InputError) as refused:
        desk.confirm_air(OPERATOR)
    assert refused.value.field == "air_max_age_min"
    assert "31 min ago" in str(refused.value)
    assert engine.store.environment(second) == []
    assert engine.state is EngineState.WAITING_FOR_OPERATOR


def test_there_is_nothing_to_confirm_before_the_air_was_read(desk: VisitDesk) -> None:
    desk.start_beam("6 MV", OPERATOR)
    with pytest.raises(InputError) as refused:
        desk.confirm_air(OPERATOR)
    assert refused.value.field == "environment"


def test_the_visits_own_age_limit_is_checked(tmp_path: Path, clock: WallClock) -> None:
    desk = _desk(tmp_path / "station.sqlite", clock)
    try:
        with pytest.raises(InputError) as refused:
            desk.start("DEMO-LA1", {"operator": OPERATOR, "air_max_age_min": 0}, OPERATOR)
        assert refused.value.field == "air_max_age_min"
        assert visits.visits(desk.store) == []
    finally:
        desk.store.close()


def test_a_beam_keeps_its_register_row_ids_and_refuses_ones_that_are_not_ids(
    desk: VisitDesk,
) -> None:
    desk.add_beam(_beam("15 MV"), "default", OPERATOR, {"beams": 3, "chambers": 1})
    shown = desk.snapshot()["beams"][-1]
    assert shown["register_ids"] == {"beams": 3, "chambers": 1}
    with pytest.raises(InputError) as refused:
        desk.add_beam(_beam("18 MV"), "default", OPERATOR, {"chambers": "the blue one"})
    assert refused.value.field == "register_ids"
    assert [b["name"] for b in desk.snapshot()["beams"]] == ["6 MV", "10 MV", "15 MV"]


def test_a_beam_added_with_register_ids_starts_its_session_filled_from_the_registers(
    tmp_path: Path, clock: WallClock
):
    """Issue 14 meets issue 15: a visit's beam names its register rows (register_ids); its
    session's metadata is filled from them and keeps a copy (``register_copy``)."""
    from chargebook.acquire.commands.demo_data import DEMO_PICK, add_demo_registers

    desk = _desk(tmp_path / "station.sqlite", clock)
    try:
        ids = add_demo_registers(desk.store, actor=OPERATOR, today=clock.now.date())
        picked = {kind: ids[key] for kind, key in DEMO_PICK.items()}
        desk.start("DEMO-LA1", {"operator": OPERATOR}, OPERATOR)
        beam_id = desk.add_beam(_beam("6 MV"), "default", OPERATOR, picked)
        session_id = desk.start_beam(beam_id, OPERATOR)
        kept = desk.store.session(session_id).metadata()
        assert picked.items() <= kept["registers"].items()  # with the rows they lead to
        assert kept["register_copy"]["beam"]["name"] == "DEMO-LA1 6 MV"
        assert kept["register_copy"]["certificate"]["fields"]["number"] == "SIM-CAL-0001"
        assert visits.beams(desk.store, desk.visit_id)[0].register_ids() == picked
    finally:
        desk.store.close()
