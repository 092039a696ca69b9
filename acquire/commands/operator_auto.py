"""The automatic operator: a daemon client that takes a whole plan through without a person.

It does what a careful operator would, and nothing a person must judge is hidden: it reads
the temperature and pressure (from the bench's thermometer and barometer, or values given),
confirms each manual bias change (the daemon's bench turns the simulated switch), arms each
step, lets the simulated linac deliver, accepts each completed set, continues a set that was
interrupted once the instrument is back, and runs optional steps too. Every action is recorded
in the audit log under the actor ``automatic operator``. It also runs a calibration visit
(:meth:`AutoOperator.run_visit`): each beam in turn, the air of the first beam read from the
bench and confirmed for the next ones while the daemon accepts the confirmation (else read
again), then the visit closed.

Used by ``chargebook run --unattended`` and ``chargebook demo --unattended``, and by tests.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from chargebook.acquire.client import DaemonClient, DaemonError
from chargebook.acquire.protocol import EngineState, Method

ACTOR = "automatic operator"
#: Longest wait for the daemon to move on by itself (a reading, a reconnection), s.
STALL_TIMEOUT_S = 120.0


class AutoOperatorError(RuntimeError):
    """The automatic operator cannot go on; the message says why in plain words.

    ``code`` is the daemon's error code when the daemon refused a request (else None), so a
    command can tell input the daemon refused from a failure.
    """

    def __init__(self, message: str, code: int | None = None) -> None:
        super().__init__(message)
        self.code = code


@dataclass(frozen=True)
class Environment:
    """Air temperature (°C) and pressure (in ``pressure_unit``) to enter, and where from.

    The pressure goes to the daemon in the unit it was read in, which converts it once and
    records the conversion.
    """

    temperature_C: float
    pressure: float
    source: str
    pressure_unit: str = "kPa"


ReadingCallback = Callable[[dict[str, Any], dict[str, Any]], None]


def environment_from_bench(control_path: str) -> Callable[[], Environment]:
    """Return a callable that reads the bench's thermometer and barometer each time."""
    from chargebook.acquire.daemon.bench import Bench

    def read() -> Environment:
        bench = Bench(control_path)
        try:
            temperature_C, pressure_kPa = bench.environment()
        finally:
            bench.close()
        return Environment(temperature_C, pressure_kPa, "bench thermometer and barometer")

    return read


class AutoOperator:
    """Runs the daemon's plan to the end through ``client`` (already connected)."""

    def __init__(
        self,
        client: DaemonClient,
        environment: Callable[[], Environment],
        *,
        on_reading: ReadingCallback | None = None,
        stall_timeout_s: float = STALL_TIMEOUT_S,
    ) -> None:
        self.client = client
        self.environment = environment
        self.on_reading = on_reading
        self.stall_timeout_s = stall_timeout_s
        self._seen: set[int] = set()
        #: In a visit, confirm the air last read in it instead of reading it again.
        self.confirm_air = False

    async def start(
        self, metadata: dict[str, Any], plan: Any = None, *, take_over: bool = False
    ) -> dict[str, Any]:
        """Subscribe, start a session (a finished one is closed first), and return the
        snapshot. A session already open (left by a console, or by a daemon that stopped) is
        refused unless ``take_over``: accepting every set of someone else's measurement is not
        the automatic operator's to do."""
        snapshot = await self.client.subscribe()
        if snapshot["state"] in (EngineState.FINISHED, EngineState.ABORTED):
            snapshot = await self.client.call(Method.SESSION_CLOSE)
        if snapshot["state"] != EngineState.IDLE and not take_over:
            session = snapshot.get("session") or {}
            raise AutoOperatorError(
                f"session {session.get('id')} is open ({snapshot['state']}): the automatic "
                "operator does not take over a session it did not start. Finish or abort it at "
                "the console, then run this again."
            )
        if snapshot["state"] == EngineState.IDLE:
            try:
                snapshot = await self.client.call(
                    Method.SESSION_START, metadata=metadata, plan=plan
                )
            except DaemonError as refused:
                raise AutoOperatorError(
                    f"the session cannot start: {refused.message}", refused.code
                ) from None
        return snapshot

    async def run_until(
        self, snapshot: dict[str, Any], done: Callable[[dict[str, Any]], bool]
    ) -> dict[str, Any]:
        """Act, one step at a time, until ``done(snapshot)``; return that snapshot."""
        while not done(snapshot):
            self._report(snapshot)
            if snapshot["state"] in (EngineState.ABORTED, EngineState.FINISHED):
                raise AutoOperatorError(
                    f"the session ended ({snapshot['state']}) before the goal was reached"
                )
            snapshot = await self.act(snapshot)
        self._report(snapshot)
        return snapshot

    async def run(
        self, metadata: dict[str, Any], plan: Any = None, *, take_over: bool = False
    ) -> dict[str, Any]:
        """Start a session (or, with ``take_over``, continue the open one), take it to the end,
        return the final snapshot."""
        snapshot = await self.start(metadata, plan, take_over=take_over)
        return await self.run_until(snapshot, lambda s: s["state"] == EngineState.FINISHED)

    async def run_visit(
        self,
        machine: str,
        operator: str,
        beams: list[tuple[dict[str, Any], str]],
        on_beam: Callable[[dict[str, Any], str], None] | None = None,
    ) -> dict[str, Any]:
        """Open a visit at ``machine``, measure ``beams`` ((session metadata, plan) each; the
        metadata's ``registers``, if any, are the beam's register rows) in order, close the
        visit; return the final snapshot (its ``visit`` is the summary). ``on_beam`` is told of
        each beam as it starts."""
        snapshot = await self.client.subscribe()
        if snapshot["state"] in (EngineState.FINISHED, EngineState.ABORTED):
            snapshot = await self.client.call(Method.SESSION_CLOSE)
        try:
            await self.client.call(
                Method.VISIT_START, machine=machine, metadata={"operator": operator}
            )
            for index, (metadata, plan) in enumerate(beams):
                given = {k: v for k, v in metadata.items() if k != "registers"}
                registers = metadata.get("registers") or {}  # the beam's register rows
                await self.client.call(
                    Method.VISIT_ADD_BEAM, metadata=given, plan=plan, register_ids=registers
                )
                if on_beam is not None:
                    on_beam(metadata, plan)
                self.confirm_air = index > 0
                snapshot = await self.client.call(Method.VISIT_START_BEAM, beam=metadata["beam"])
                await self.run_until(snapshot, lambda s: s["state"] == EngineState.FINISHED)
                await self.client.call(Method.SESSION_CLOSE)
            return await self.client.call(Method.VISIT_CLOSE)
        except DaemonError as refused:
            raise AutoOperatorError(
                f"the visit cannot go on: {refused.message}", refused.code
            ) from None

    async def act(self, snapshot: dict[str, Any]) -> dict[str, Any]:
        """Do the one thing the snapshot asks for (or wait for the next snapshot)."""
        allowed = snapshot["allowed"]
        prompt = snapshot["prompt"]
        if prompt["kind"] == "environment" and Method.ENVIRONMENT_SET in allowed:
            if self.confirm_air:
                self.confirm_air = False  # once: a refusal means read the air again
                try:
                    return await self.client.call(Method.VISIT_CONFIRM_AIR)
                except DaemonError as refused:
                    if refused.field != "air_max_age_min":
                        raise
            entry = self.environment()
            return await self.client.call(
                Method.ENVIRONMENT_SET,
                temperature_C=entry.temperature_C,
                pressure=entry.pressure,
                pressure_unit=entry.pressure_unit,
                source=entry.source,
            )
        if Method.STEP_MANUAL_DONE in allowed:
            if not snapshot["instrument"]["bench"]:
                raise AutoOperatorError(
                    "the plan needs a manual step (" + prompt["text"] + ") and no bench is "
                    "attached to do it; run the daemon with --bench-control, or attend the session"
                )
            return await self.client.call(Method.STEP_MANUAL_DONE, note="confirmed automatically")
        if Method.SET_ACCEPT in allowed:
            return await self.client.call(Method.SET_ACCEPT)
        if Method.STEP_ARM in allowed:
            if not snapshot["instrument"]["bench"] and _needs_beam(snapshot):
                raise AutoOperatorError(
                    "nobody can deliver the beam: run the daemon with --bench-control "
                    "(a simulated linac), or attend the session"
                )
            return await self.client.call(Method.STEP_ARM)
        seq = snapshot["seq"]
        try:
            return await self.client.wait_for_snapshot(
                lambda s: s["seq"] > seq, timeout_s=self.stall_timeout_s
            )
        except TimeoutError:
            raise AutoOperatorError(stalled(snapshot, self.stall_timeout_s)) from None

    def _report(self, snapshot: dict[str, Any]) -> None:
        if self.on_reading is None:
            return
        for entry in snapshot["sets"]:
            for reading in entry["readings"]:
                if reading["id"] not in self._seen:
                    self._seen.add(reading["id"])
                    self.on_reading(entry, reading)


def _needs_beam(snapshot: dict[str, Any]) -> bool:
    index = snapshot["step_index"]
    plan = snapshot["plan"]
    return index is not None and index < len(plan) and plan[index]["mu_per_reading"] > 0


def stalled(snapshot: dict[str, Any], waited_s: float) -> str:
    """Return, in words, why an unattended session gave up waiting: nothing changed in
    ``waited_s`` seconds; what the daemon says of the electrometer; what became of the
    session (left open, recorded as it stood)."""
    instrument = snapshot["instrument"]
    state = "connected" if instrument["connected"] else "not reachable"
    said = f" ({instrument['message']})" if instrument["message"] else ""
    session = (snapshot.get("session") or {}).get("id")
    left = (
        ""
        if session is None
        else (
            f"; session {session} is left open as recorded: resume it with `chargebook serve` "
            "and `chargebook console`, or abort it there"
        )
    )
    return (
        f"nothing changed for {waited_s:.0f} s while the session waited on the electrometer, "
        f"which is {state}{said}{left}"
    )
