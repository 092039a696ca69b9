"""The calibration visit the daemon keeps: several beams at one machine, one session each.

A :class:`VisitDesk` sits beside the :class:`~chargebook.acquire.engine.engine.Engine` and
reuses its session lifecycle: starting a beam is the engine's ``start_session`` with the
beam's metadata and plan, linked to the visit in the same transaction; stopping, aborting and
closing the beam's session are the engine's own actions. The desk adds what a sitting needs:
beams added in the physicist's order (two of one name refused), skipped with a reason, the air
data carried from the beam before only when confirmed in time, and the summary across beams.

The open visit is in the record, so a restarted daemon takes it up again (:meth:`restore`).
Every method that writes runs inside the engine's ``all_or_nothing`` (the daemon's dispatch).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from chargebook.acquire.engine.engine import DAEMON_ACTOR, Engine
from chargebook.acquire.engine.states import IllegalTransition
from chargebook.acquire.protocol import EngineState, Method
from chargebook.acquire.record import visits
from chargebook.acquire.session import rules, visit_rules
from chargebook.acquire.session.plan import load_plan, shipped_plans
from chargebook.acquire.session.visit_summary import ClosedResults, summarize_visit
from chargebook.corrections.errors import InputError


class VisitDesk:
    """The daemon's calibration visit, over the engine and its store."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self.store = engine.store
        self.visit_id: int | None = None  # the visit shown: open, or just closed
        self._summary: tuple[tuple[int, int], dict[str, Any] | None] | None = None
        self.version = 0
        self._plans: list[dict[str, Any]] | None = None
        self._closed: ClosedResults = {}  # results of the visit's sessions closed for good

    def restore(self) -> None:
        """Take up the visit left open by an earlier run of the daemon, if any."""
        found = visits.open_visit(self.store)
        self.visit_id = found.id if found is not None else None

    # ------------------------------------------------------------------------- actions
    def start(self, machine: str, metadata: dict[str, Any], actor: str = DAEMON_ACTOR) -> int:
        """Open a visit at ``machine``; return its id."""
        checked = visit_rules.validate_visit_metadata(metadata)
        visit_id = visits.create_visit(self.store, machine, checked, actor)
        self.visit_id = visit_id
        self._changed()
        return visit_id

    def add_beam(
        self,
        metadata: dict[str, Any],
        plan: str | None = None,
        actor: str = DAEMON_ACTOR,
        register_ids: dict[str, int] | None = None,
    ) -> int:
        """Add a beam (its session metadata; its name is the metadata's ``beam``) with its
        plan (a shipped plan's name or a plan file; None: the daemon's own); return its id."""
        current = self._open(Method.VISIT_ADD_BEAM)
        if plan is None:
            plan = self._own_plan()
        rules.resolve_plan(plan)  # an unknown plan is refused now, not when the beam starts
        checked = rules.validate_metadata(visit_rules.beam_metadata(current.machine, metadata))
        registers = visit_rules.check_register_ids(register_ids)
        beam_id = visits.add_beam(
            self.store, current.id, str(checked["beam"]), plan, checked, actor, registers
        )
        self._changed()
        return beam_id

    def _own_plan(self) -> str:
        """Return the daemon's own plan as the name or file a beam records."""
        default = self.engine.default_plan
        if isinstance(default, str | Path):
            return str(default)
        raise InputError("plan", None, "a shipped plan's name or a plan file", "is missing")

    def start_beam(
        self, beam: int | str, actor: str = DAEMON_ACTOR, mu_per_reading: float | None = None
    ) -> int:
        """Start the session of one beam (by id or name), with the MU per reading chosen in
        the setup (None: the plan's); return the session id."""
        current = self._open(Method.VISIT_START_BEAM)
        state = self._beam(current.id, beam)
        if state.status not in visits.STARTABLE:
            raise InputError(
                "beam",
                state.beam.name,
                "a beam planned, skipped or left unfinished",
                f"is {state.status} (session {state.session_id})",
            )
        metadata = state.beam.metadata()
        registers = state.beam.register_ids()
        if registers:  # the session's metadata filled from the station registers
            metadata = {**metadata, "registers": registers}
        session_id = self.engine.start_session(metadata, state.beam.plan, actor, mu_per_reading)
        visits.link_session(self.store, current.id, state.beam.id, session_id, actor)
        self._changed()
        return session_id

    def skip_beam(self, beam: int | str, reason: str, actor: str = DAEMON_ACTOR) -> None:
        """Record a beam as skipped, with the reason."""
        current = self._open(Method.VISIT_SKIP_BEAM)
        state = self._beam(current.id, beam)
        visits.mark_beam(self.store, current.id, state.beam.id, "skipped", reason, actor)
        self._changed()

    def close(self, reason: str | None = None, actor: str = DAEMON_ACTOR) -> None:
        """Close the visit; beams never measured are recorded unfinished with ``reason``."""
        current = self._open(Method.VISIT_CLOSE)
        visits.close_visit(self.store, current.id, reason, actor)
        self._changed()

    def confirm_air(self, actor: str = DAEMON_ACTOR) -> int:
        """Record the air data last read in this visit again, for the beam's session, as
        confirmed by the operator; return the entry's id. Refused past the visit's
        ``air_max_age_min`` (the values must be read again) and with nothing to confirm."""
        current = self._open(Method.VISIT_CONFIRM_AIR)
        engine = self.engine
        session_id = engine.session_id
        if session_id is None or engine.state in (EngineState.FINISHED, EngineState.ABORTED):
            raise IllegalTransition(
                Method.VISIT_CONFIRM_AIR, engine.state, engine.allowed(), "no beam is measured now"
            )
        read, read_in = self._last_read(current.id)
        if read is None or read_in is None:
            raise InputError(
                "environment",
                None,
                "air data read earlier in this visit",
                "is missing: enter the temperature and pressure",
            )
        age = visit_rules.age_min(read.recorded_at, self.store.stamp())
        visit_rules.refuse_old_air(age, current.metadata()["air_max_age_min"], read.recorded_at)
        return engine.set_environment(
            read.temperature_C,
            read.pressure_entered,
            read.pressure_unit,
            read.humidity_pct,
            visit_rules.confirmed_source(read, age, read_in),
            actor=actor,
        )

    # ------------------------------------------------------------------------- reading
    def plan_choices(self) -> list[dict[str, Any]]:
        """Return the plans a setup may choose, the daemon's own first: name, description and
        MU per reading of the compared steps (what the setup's MU entry starts from)."""
        if self._plans is None:
            default = self.engine.default_plan
            plans = [rules.resolve_plan(default)] if default is not None else []
            names = {plan.name for plan in plans}
            plans += [load_plan(name) for name in shipped_plans() if name not in names]
            self._plans = [
                {
                    "name": plan.name,
                    "description": plan.description,
                    "mu_per_reading": plan.result_mu_per_reading(),
                    "daemon_default": index == 0 and default is not None,
                }
                for index, plan in enumerate(plans)
            ]
        return self._plans

    def snapshot(self) -> dict[str, Any] | None:
        """Return the visit shown (summary across beams, the air data's reading time and the
        age limit), or None; cached until the engine's record or the visit changes."""
        key = (self.engine.data_version, self.version)
        if self._summary is not None and self._summary[0] == key:
            return self._summary[1]
        value = None
        if self.visit_id is not None:
            value = summarize_visit(self.store, self.visit_id, self._closed).to_dict()
            read, read_in = self._last_read(self.visit_id)
            value["air"] = (
                None
                if read is None
                else {"read_at": read.recorded_at, "session": read_in, "source": read.source}
            )
        self._summary = (key, value)
        return value

    def _last_read(self, visit_id: int) -> tuple[Any, int | None]:
        """Return the newest entry of the visit's sessions whose values were read, and its
        session (None, None when there is none)."""
        found: list[tuple[Any, int]] = []
        for state in visits.beam_states(self.store, visit_id):
            for session_id in state.sessions:
                read = visit_rules.last_read(self.store.environment(session_id))
                if read is not None:
                    found.append((read, session_id))
        if not found:
            return None, None
        return max(found, key=lambda pair: pair[0].recorded_at)

    def _open(self, action: str) -> visits.VisitRow:
        current = visits.visit(self.store, self.visit_id) if self.visit_id is not None else None
        if current is None or current.status != "open":
            raise IllegalTransition(
                action, self.engine.state, [Method.VISIT_START], "no visit is open"
            )
        return current

    def _beam(self, visit_id: int, beam: int | str) -> visits.BeamState:
        states = visits.beam_states(self.store, visit_id)
        for state in states:
            if state.beam.id == beam or (
                isinstance(beam, str) and visits.same_name(state.beam.name, beam)
            ):
                return state
        names = ", ".join(state.beam.name for state in states) or "none yet"
        raise InputError("beam", beam, f"a beam of visit {visit_id}: {names}", "is not one")

    def _changed(self) -> None:
        self.version += 1
        self.engine.record_changed()
