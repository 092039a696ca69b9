"""At session start: copy the carried k_pol and k_s of an output check into its metadata.

A plan with no opposite-polarity step cannot measure k_pol, one with no reduced-bias step
cannot measure k_s. For such a plan each missing factor is *carried*: entered in the session's
metadata (``carried_k_pol``, ``carried_k_s`` with their source), or else taken from the beam's
last full calibration in this station file. That is the newest session that

* finished (not aborted, not open), and is not a replay;
* took opposite-polarity and reduced-bias readings (its plan has both steps) and gave a
  measured k_pol and k_s;
* has the same ``treatment_machine``, ``beam``, ``chamber_serial`` and ``electrometer_serial``
  in its metadata, compared as typed (the station's registers of beams, chambers and
  electrometers are not built yet).

The factor's value, its Type A uncertainty in that session, the session's id and date are
copied into the new session's metadata, so the record holds what was used and a later session
never changes an old record's results. When nothing can be carried (no such calibration, or
only one with another chamber or electrometer) the factor stays pending and so does the dose,
as for any plan that lacks readings. A factor both carried and measured by the plan is refused.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from chargebook.acquire.record.store import SessionRow, Store
from chargebook.acquire.session.evaluation import evaluate_session
from chargebook.acquire.session.plan import Plan
from chargebook.acquire.session.session_kind import FULL_CALIBRATION, session_kind
from chargebook.corrections.carried import MEASURED_BY
from chargebook.corrections.errors import InputError
from chargebook.corrections.stability import SET_NAMES

#: The metadata fields a full calibration must share with the output check.
MATCHED_FIELDS = ("treatment_machine", "beam", "chamber_serial", "electrometer_serial")


def carried_metadata(
    store: Store, metadata: Mapping[str, Any], plan: Plan, today: str
) -> dict[str, Any]:
    """Return ``metadata`` (checked, plain) with the carried factors the plan needs filled in.

    ``today``: the session's start date (YYYY-MM-DD), recorded as each factor's
    ``session_date``. Raises InputError naming ``carried_k_pol`` or ``carried_k_s`` when a
    factor is both carried and measured, or needed and not found.
    """
    result = dict(metadata)
    purposes = {step.purpose for step in plan.steps}
    for key, purpose in MEASURED_BY.items():
        words = SET_NAMES[purpose]
        name = f"carried_{key}"
        given = result.get(name)
        if purpose in purposes:
            if given is not None:
                raise InputError(
                    name,
                    given.get("value") if isinstance(given, Mapping) else given,
                    f"no {name} with a plan that takes {words} readings",
                    f"is both measured and carried (plan {plan.name!r} measures {key})",
                )
            continue
        if given is None:
            given = _from_full_calibration(store, result, key)
        if given is None:
            continue  # nothing to carry: the factor stays pending, as with no readings
        result[name] = {**given, "session_date": given.get("session_date") or today}
    return result


def _matches(row: SessionRow, metadata: Mapping[str, Any], fields: tuple[str, ...]) -> bool:
    stored = row.metadata()
    return all(stored.get(name) == metadata.get(name) for name in fields)


def _full_calibrations(store: Store, metadata: Mapping[str, Any]) -> list[SessionRow]:
    """Return the finished, recorded (not replayed) full calibrations of the beam, newest first."""
    return [
        row
        for row in reversed(store.sessions())
        if row.status == "finished"
        and row.replay_of is None
        and session_kind(row.plan()) == FULL_CALIBRATION
        and _matches(row, metadata, MATCHED_FIELDS[:2])
    ]


def _from_full_calibration(
    store: Store, metadata: Mapping[str, Any], key: str
) -> dict[str, Any] | None:
    """Return the carried-factor object of ``key`` from the beam's last full calibration with
    this chamber and electrometer, or None when there is none."""
    candidates = _full_calibrations(store, metadata)
    for row in candidates:
        if not _matches(row, metadata, MATCHED_FIELDS[2:]):
            continue
        evaluation = evaluate_session(store, row.id).evaluation
        factor = None if evaluation is None else evaluation.factors[key]
        if factor is None or factor.state != "measured":
            continue
        date = row.created_at[:10]
        u_source = f"Type A of session {row.id}" if factor.u_rel_pct is not None else None
        return {
            "value": factor.value,
            "source": f"session {row.id} of {date}, {FULL_CALIBRATION}",
            "date": date,
            "u_pct": factor.u_rel_pct,
            "u_source": u_source,
            "chamber_serial": metadata["chamber_serial"],
            "electrometer_serial": metadata["electrometer_serial"],
            "from_session": row.id,
        }
    return None
