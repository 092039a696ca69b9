"""Which sessions a filter by beam and machine keeps: light to import (no physics, no
numpy), since ``sessions`` lists thousands of rows and must start quickly."""

from __future__ import annotations

import functools
from collections.abc import Mapping
from typing import Any

from chargebook.acquire.record.store import SessionRow


def _same(a: object, b: str) -> bool:
    return isinstance(a, str) and " ".join(a.split()).casefold() == " ".join(b.split()).casefold()


def matches(
    row: SessionRow,
    beam: str | None,
    machine: str | None,
    meta: Mapping[str, Any] | None = None,
) -> bool:
    """Return True when the session measured ``beam`` on ``machine`` (None: any).

    Names compare without regard to case or repeated spaces ("6 mv" is "6 MV"). ``meta``: the
    session's metadata when the caller has already decoded it.
    """
    if meta is not None:
        return _names_match(row, meta, beam, machine)
    return (beam is None and machine is None) or matching_metadata(row, beam, machine) is not None


def matching_metadata(
    row: SessionRow, beam: str | None, machine: str | None
) -> dict[str, Any] | None:
    """Return the session's metadata when it measured ``beam`` on ``machine`` (:func:`matches`),
    else None; decoded only when its text may hold the names (decoding every session's
    metadata is most of the cost of a history of one machine among several)."""
    beam_in_text = beam is not None and not _same(row.beam, beam)
    if not _may_hold(row.metadata_json, _folded_words(beam if beam_in_text else None, machine)):
        return None
    meta = row.metadata()
    return meta if _names_match(row, meta, beam, machine) else None


def _names_match(
    row: SessionRow, meta: Mapping[str, Any], beam: str | None, machine: str | None
) -> bool:
    beam_ok = beam is None or _same(meta.get("beam"), beam) or _same(row.beam, beam)
    return beam_ok and (machine is None or _same(meta.get("treatment_machine"), machine))


@functools.cache
def _folded_words(*names: str | None) -> tuple[str, ...]:
    """Return the words of ``names`` casefolded (None: no words)."""
    return tuple(word.casefold() for name in names for word in (name or "").split())


def _may_hold(text: str, folded_words: tuple[str, ...]) -> bool:
    """Return False only when the JSON ``text`` cannot hold a value made of ``folded_words``
    (casefolded): a value is written in it literally unless escaped, so a text with no escape
    at all that lacks one of the words, case aside, lacks the value. Most sessions are set
    aside here without decoding their metadata."""
    if "\\" in text:
        return True  # an escape may hide a word: decode and compare
    folded = text.casefold()
    return all(word in folded for word in folded_words)
