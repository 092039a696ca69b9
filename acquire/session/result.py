"""A recorded session's result, recomputed from its stored raw values, as one JSON document.

The document has the keys of ``chargebook correct --json`` (the ``Evaluation.to_dict()`` keys,
``session``, ``monte_carlo`` and ``caution``; there is no ``worksheet``) plus ``session_id``
and ``results_error``, so scripts read a live session and a logbook worksheet alike. The
results are those of :func:`chargebook.acquire.session.evaluation.evaluate_session`, the one
evaluation every output of a session uses.
"""

from __future__ import annotations

from typing import Any

from chargebook.acquire.record.store import Store
from chargebook.acquire.session.evaluation import evaluate_session


def result_document(store: Store, session_id: int) -> dict[str, Any]:
    """Return the session's result document (see the module docstring)."""
    from chargebook.acquire.protocol import CAUTION

    row = store.session(session_id)
    found = evaluate_session(store, session_id)
    document: dict[str, Any] = {
        "session_id": session_id,
        "session": {**row.metadata(), "status": row.status, "created_at": row.created_at},
        "results_error": found.error,
    }
    evaluation = found.evaluation
    document.update(evaluation.to_dict() if evaluation is not None else {})
    document["monte_carlo"] = (
        None
        if evaluation is None or evaluation.u_combined_pct is None
        else evaluation.monte_carlo().to_dict()
    )
    document["caution"] = CAUTION
    return document
