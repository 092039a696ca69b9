"""A recorded session's result, recomputed from its stored raw values, as one JSON document.

The document has the keys of ``chargebook correct --json`` (the ``Evaluation.to_dict()`` keys,
``session``, ``monte_carlo`` and ``caution``; there is no ``worksheet``) plus ``session_id``,
so scripts read a live session and a logbook worksheet alike.
"""

from __future__ import annotations

from typing import Any

from chargebook.acquire import live
from chargebook.acquire.store import Store


def session_evaluation(store: Store, session_id: int) -> Any:
    """Return ``evaluate(...)`` of a stored session: accepted sets, latest environment, metadata."""
    from chargebook.corrections.evaluate import evaluate

    row = store.session(session_id)
    plan = live.resolve_plan(row.plan())
    events = store.events(session_id)
    times = live.integration_times(events)
    thresholds = live.session_thresholds(events)
    inputs, _ = live.measurement_inputs(
        store, session_id, plan, row.metadata(), None, times, thresholds
    )
    return evaluate(inputs)


def result_document(store: Store, session_id: int) -> dict[str, Any]:
    """Return the session's result document (see the module docstring)."""
    from chargebook.acquire.cli import CAUTION

    row = store.session(session_id)
    evaluation = session_evaluation(store, session_id)
    document: dict[str, Any] = {
        "session_id": session_id,
        "session": {**row.metadata(), "status": row.status, "created_at": row.created_at},
    }
    document.update(evaluation.to_dict())
    document["monte_carlo"] = (
        None if evaluation.u_combined_pct is None else evaluation.monte_carlo().to_dict()
    )
    document["caution"] = CAUTION
    return document
