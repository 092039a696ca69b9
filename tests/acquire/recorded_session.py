"""Build recorded sessions in a real store, through the Store API, for the read-side tests.

The readings, environment and calibration are those of the invented example worksheet
``acquire/examples/demo-la1-6mv.toml`` (the fictional Example Clinic, DEMO-LA1, 6 MV; not
a real measurement), laid out as the daemon records a session: a leakage set, a routine set with one
settling reading, an opposite-polarity set redone once (the first attempt superseded, one
reading captured by hand), a reduced-bias set, the instrument identity, two environment entries
(the pressure typed in hPa) and the events the daemon writes.
"""

from __future__ import annotations

import atexit
import functools
import shutil
import tempfile
import tomllib
from importlib import resources
from pathlib import Path
from typing import Any

from chargebook.acquire.record.events import (
    BiasChanged,
    EventKind,
    InstrumentIdentified,
    ReadingRecorded,
)
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.metadata import validate_metadata
from chargebook.acquire.session.plan import Plan, SettlingRule, Step

OPERATOR = "operator A"
ROUTINE_INTEGRATION_S = 6.0
LEAKAGE_DURATION_S = 60.0
SETTLING_READING_nC = 14.790
SUPERSEDED_nC = (-14.702, -14.688)
SUPERSEDE_REASON = "chamber cable moved during the beam"
#: The instrument as the daemon records it: the answer to its identification, joined, and the
#: profile it reads the wire with (``Engine.instrument_back``).
INSTRUMENT = InstrumentIdentified(
    identity="Bench, SIM-MODEL-1, SIM-EM-0001, 1.4", profile="scpi-generic"
)


def example() -> dict[str, Any]:
    """Return the example worksheet's contents (invented Example Clinic data)."""
    text = (resources.files("chargebook.acquire") / "examples" / "demo-la1-6mv.toml").read_text()
    return tomllib.loads(text)


def example_plan() -> Plan:
    """Return a plan shaped like the example: leakage, 5 routine (+1 settling), 3, 3."""
    data = example()
    routine_V = float(data["bias"]["routine_V"])
    reduced_V = float(data["bias"]["reduced_V"])
    mu = float(data["calibration"]["monitor_units"])
    return Plan(
        "example-clinic",
        (
            Step("leakage", "leakage", 1, routine_V, 1, 0.0, duration_s=LEAKAGE_DURATION_S),
            Step("routine", "routine", 1, routine_V, 5, mu, SettlingRule(discard_first=1)),
            Step("opposite", "opposite", -1, -routine_V, 3, mu),
            Step("reduced", "reduced", 1, reduced_V, 3, mu),
        ),
        routine_bias_V=routine_V,
        reduced_bias_V=reduced_V,
    )


def required_metadata() -> dict[str, Any]:
    """Return the example's session metadata with only the required keys, as typed in."""
    data = example()
    return {
        "treatment_machine": data["session"]["machine"],
        "beam": "6 MV",
        "beam_type": data["beam"],
        "convention": data["convention"],
        "chamber_model": "thimble 0.6 cc",
        "chamber_serial": "SIM-CH-0001",
        "electrometer_model": "bench electrometer",
        "electrometer_serial": data["session"]["electrometer"],
        "operator": data["session"]["operator"],
        "N_Dw": data["calibration"]["N_Dw_Gy_per_nC"],
        "k_Q": data["calibration"]["k_Q"],
        "expected_cGy_per_MU": data["calibration"]["expected_cGy_per_MU"],
    }


def example_metadata(**changes: Any) -> dict[str, Any]:
    """Return the example's full session metadata (plus ``changes``), checked, as stored."""
    data = example()
    calibration, uncertainty = data["calibration"], data["uncertainty"]
    metadata = required_metadata()
    for key in ("k_elec", "tolerance_pct", "u_N_Dw_pct_k2", "u_k_Q_pct"):
        metadata[key] = calibration[key]
    metadata.update(uncertainty)
    metadata["beam_quality"] = data["session"]["beam_quality"]
    metadata.update(changes)
    return validate_metadata(metadata).to_dict()


def _readings(
    store: Store, session_id: int, set_id: int, charges: list[float], *, first_seq: int = 1, **kw
) -> list[int]:
    ids = []
    for offset, charge in enumerate(charges):
        capture = kw.get("capture_of", {}).get(offset, "auto")
        t_s = 10.0 * (first_seq + offset)
        settling = kw.get("settling", False)
        integration_s = kw.get("integration_s", 6.0)
        reading_id = store.add_reading(
            session_id, set_id, first_seq + offset, t_s, charge, capture, settling, "ok"
        )
        recorded = ReadingRecorded(
            reading_id=reading_id,
            set_id=set_id,
            charge_nC=charge,
            capture=capture,
            settling=settling,
            integration_s=integration_s,
            armed_t_s=t_s - integration_s,
        )
        actor = OPERATOR if capture == "manual" else "daemon"
        store.add_event(session_id, actor, EventKind.READING_RECORDED, recorded)
        ids.append(reading_id)
    return ids


def _accept(store: Store, set_id: int) -> None:
    store.set_set_status(set_id, "reviewing")
    store.set_set_status(set_id, "accepted", actor=OPERATOR)


def record_example_session(
    store: Store,
    *,
    scale: float = 1.0,
    status: str = "finished",
    replay_of: int | None = None,
    **metadata_changes: Any,
) -> int:
    """Record the example as a finished session (charges multiplied by ``scale``); its id."""
    data = example()
    readings = data["readings"]
    plan = example_plan()
    metadata = example_metadata(**metadata_changes)
    session_id = store.create_session(
        metadata,
        plan.to_dict(),
        metadata["convention"],
        metadata["beam"],
        replay_of=replay_of,
        actor=OPERATOR,
    )
    store.add_event(session_id, "daemon", EventKind.INSTRUMENT_IDENTIFIED, INSTRUMENT)
    env = data["environment"]
    store.add_environment(
        session_id, env["temperature_C"] - 0.2, env["pressure_kPa"], 1006.0, "hPa", 45.0, "operator"
    )
    store.add_environment(
        session_id,
        env["temperature_C"],
        env["pressure_kPa"],
        env["pressure_kPa"] * 10,
        "hPa",
        float(env["humidity_pct"]),
        "operator",
    )

    leakage = store.add_set(session_id, 0, "leakage", "leakage", 1, plan.routine_bias_V, 1)
    leakage_nC = readings["leakage_nC"] * LEAKAGE_DURATION_S / ROUTINE_INTEGRATION_S
    _readings(store, session_id, leakage, [leakage_nC], integration_s=LEAKAGE_DURATION_S)
    _accept(store, leakage)

    remote = BiasChanged(volts=300.0, how="remote")
    store.add_event(session_id, "daemon", EventKind.BIAS_CHANGED, remote)
    routine = store.add_set(session_id, 1, "routine", "routine", 1, plan.routine_bias_V, 1)
    _readings(store, session_id, routine, [SETTLING_READING_nC * scale], settling=True)
    _readings(store, session_id, routine, [q * scale for q in readings["routine_nC"]], first_seq=2)
    _accept(store, routine)

    by_hand = BiasChanged(volts=-300.0, how="by hand")
    store.add_event(session_id, OPERATOR, EventKind.BIAS_CHANGED, by_hand)
    first_try = store.add_set(session_id, 2, "opposite", "opposite", -1, -plan.routine_bias_V, 1)
    _readings(store, session_id, first_try, [q * scale for q in SUPERSEDED_nC])
    store.set_set_status(first_try, "superseded", SUPERSEDE_REASON, actor=OPERATOR)
    second = store.add_set(session_id, 2, "opposite", "opposite", -1, -plan.routine_bias_V, 2)
    opposite = [q * scale for q in readings["opposite_nC"]]
    _readings(store, session_id, second, opposite, capture_of={1: "manual"})
    _accept(store, second)

    reduced = store.add_set(session_id, 3, "reduced", "reduced", 1, plan.reduced_bias_V, 1)
    _readings(store, session_id, reduced, [q * scale for q in readings["reduced_nC"]])
    _accept(store, reduced)

    for line in (b"*IDN?\n", b"Bench,SIM-MODEL-1,SIM-EM-0001,1.4\r\n"):
        store.add_traffic(session_id, 0.5, "tx" if line.startswith(b"*") else "rx", line)
    if status != "open":
        store.set_session_status(session_id, status, "plan complete", actor=OPERATOR)
    return session_id


def recorded_station(folder: Path) -> Path:
    """Return a new station file in ``folder`` holding the example as one finished session.

    The file is recorded once per test run (every write commits with a sync to disk, some 0.3 s
    in all) and copied: each caller gets a file of its own, byte for byte the same, to read or
    to tamper with.
    """
    path = folder / "station.sqlite"
    folder.mkdir(parents=True, exist_ok=True)  # as Store.open makes it
    shutil.copy(_recorded_once(), path)
    return path


@functools.cache
def _recorded_once() -> Path:
    """Return the example station file recorded for this test run (closed: no -wal beside it)."""
    path = Path(tempfile.mkdtemp(prefix="chargebook-recorded-")) / "station.sqlite"
    atexit.register(shutil.rmtree, path.parent, True)
    with Store.open(path) as store:
        record_example_session(store)
    if path.with_name(path.name + "-wal").exists():
        raise RuntimeError(f"{path} kept a -wal file after closing: a copy would miss rows")
    return path


#: Why each extra attempt of the long session was set aside (invented, for the demo clinic).
REDO_REASONS = (
    "monitor chamber reading jumped on the linac console",
    "door interlock opened during the beam",
    "chamber cable moved during the beam",
)


def record_long_session(store: Store, *, attempts: int = 3, readings_per_attempt: int = 12) -> int:
    """Record the example with ``attempts`` extra superseded attempts of its routine, opposite
    and reduced steps, each of ``readings_per_attempt`` readings, then finish it; its id.

    A session long enough to print on several pages. The results are the example's: only the
    accepted sets count.
    """
    session_id = record_example_session(store, status="open")
    plan = example_plan()
    readings = example()["readings"]
    charges = {1: readings["routine_nC"], 2: readings["opposite_nC"], 3: readings["reduced_nC"]}
    for step_index, step in enumerate(plan.steps):
        if step.purpose == "leakage":
            continue
        for attempt in range(attempts):
            set_id = store.add_set(
                session_id, step_index, step.key, step.purpose, step.polarity, step.bias_V,
                3 + attempt,
            )  # fmt: skip
            base = charges[step_index]
            values = [
                base[i % len(base)] * (1 + 0.0004 * (i % 5 - 2))
                for i in range(readings_per_attempt)
            ]
            _readings(store, session_id, set_id, [round(v, 3) for v in values])
            reason = REDO_REASONS[attempt % len(REDO_REASONS)]
            store.set_set_status(set_id, "superseded", reason, actor=OPERATOR)
    store.set_session_status(session_id, "finished", "plan complete", actor=OPERATOR)
    return session_id
