"""The return check reaches the live results and the session document (issue 12 item 13).

A real SQLite file through the Store API; the readings are the invented example worksheet's.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.plan import Plan, SettlingRule, Step
from chargebook.acquire.session.result import result_document
from recorded_session import OPERATOR, example, example_metadata


def _plan() -> Plan:
    return Plan(
        "with-return",
        (
            Step("routine", "routine", 1, 300.0, 3, 100.0, SettlingRule()),
            Step("return_check", "return_check", 1, 300.0, 3, 100.0, SettlingRule()),
        ),
        routine_bias_V=300.0,
        reduced_bias_V=100.0,
    )


def _record(
    store: Store, routine: list[float], returned: list[float], return_air_C: float | None = None
) -> int:
    plan = _plan()
    metadata = example_metadata()
    session_id = store.create_session(
        metadata, plan.to_dict(), metadata["convention"], metadata["beam"], actor=OPERATOR
    )
    env = example()["environment"]
    store.add_environment(
        session_id,
        env["temperature_C"],
        env["pressure_kPa"],
        env["pressure_kPa"],
        "kPa",
        45.0,
        "operator",
    )
    for index, (key, charges) in enumerate((("routine", routine), ("return_check", returned))):
        if key == "return_check" and return_air_C is not None:
            pressure = env["pressure_kPa"]
            store.add_environment(
                session_id, return_air_C, pressure, pressure, "kPa", 45.0, "operator"
            )
        set_id = store.add_set(session_id, index, key, key, 1, 300.0, 1)
        for seq, charge in enumerate(charges, start=1):
            store.add_reading(session_id, set_id, seq, 10.0 * seq, charge, "auto", False, "ok")
        store.set_set_status(set_id, "reviewing")
        store.set_set_status(set_id, "accepted", actor=OPERATOR)
    return session_id


def test_a_moved_return_check_is_reported_and_flagged(tmp_path: Path) -> None:
    with Store.open(tmp_path / "station.sqlite") as store:
        session_id = _record(store, [14.749, 14.751, 14.750], [14.80, 14.81, 14.80])
        document = result_document(store, session_id)
    check = document["return_check"]
    # 14.80333/14.75 − 1 = +0.362 %, above the 0.2 % threshold (common practice).
    assert check["deviation_pct"] == pytest.approx(100 * ((14.80 + 14.81 + 14.80) / 3 / 14.75 - 1))
    assert "return_check_moved" in {flag["code"] for flag in document["flags"]}
    assert any(line["component"].startswith("between-set") for line in document["budget"])


def _ticking_clock() -> Callable[[], datetime]:
    """Return a clock that moves 1 ms at each call, so records keep their order."""
    start = datetime(2026, 3, 2, 8, 0, tzinfo=UTC)
    ticks = itertools.count()
    return lambda: start + timedelta(milliseconds=next(ticks))


def test_the_return_check_is_compared_in_the_routine_sets_air(tmp_path: Path) -> None:
    # The air warmed 0.5 °C before the return check and the chamber read 0.17 % less, as the
    # TRS-398 (2000) k_TP = ((273.2 + T)/293.2)·(101.325/P) says it must: the output held.
    routine = [14.749, 14.751, 14.750]
    T = example()["environment"]["temperature_C"]
    scale = (273.2 + T + 0.5) / (273.2 + T)
    returned = [charge / scale for charge in routine]
    with Store.open(tmp_path / "station.sqlite", now=_ticking_clock()) as store:
        session_id = _record(store, routine, returned, return_air_C=T + 0.5)
        document = result_document(store, session_id)
    assert document["results_error"] is None
    check = document["return_check"]
    assert check["air_scale"] == pytest.approx(scale, rel=1e-12)
    assert check["deviation_pct"] == pytest.approx(0.0, abs=1e-9)
    assert "return_check_moved" not in {flag["code"] for flag in document["flags"]}
    assert document["set_air"]["routine"]["entry"] == 1  # the routine set keeps its own air
