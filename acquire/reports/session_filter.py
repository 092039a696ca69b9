"""Which sessions a filter by beam and machine keeps: light to import (no physics, no
numpy), since ``sessions`` lists thousands of rows and must start quickly."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from chargebook.acquire.record.store import ListedSession, SessionRow


def _same(a: object, b: str) -> bool:
    return isinstance(a, str) and " ".join(a.split()).casefold() == " ".join(b.split()).casefold()


def matches(
    row: SessionRow | ListedSession,
    beam: str | None,
    machine: str | None,
    meta: Mapping[str, Any] | None = None,
) -> bool:
    """Return True when the session measured ``beam`` on ``machine`` (None: any).

    Names compare without regard to case or repeated spaces ("6 mv" is "6 MV"). ``meta``: the
    session's metadata (or its names: ``RecordReader.session_names``) when the caller has it;
    a listed session (:class:`ListedSession`) must be given them.
    """
    if beam is None and machine is None:
        return True
    if meta is None:
        if isinstance(row, ListedSession):
            raise TypeError("a listed session holds no metadata: pass its names as meta")
        meta = row.metadata()
    beam_ok = beam is None or _same(meta.get("beam"), beam) or _same(row.beam, beam)
    return beam_ok and (machine is None or _same(meta.get("treatment_machine"), machine))
