"""The hash chain that makes a changed record show: one chain per session over its appended rows.

Every row appended to readings, environment, events, traffic and inputs carries ``chain_seq``, its
place in its session's sequence of rows (1, 2, 3, ... across the tables, in the order the rows were
written; status changes of sessions and sets are events, so they are in it too), and
``chain_hash``, the SHA-256 of the previous row's hash and this row's canonical bytes
(:func:`link`). The session's own row and its reading sets are in the chain too, by their fixed
facts only (metadata, plan, bias, purpose ...: what may never change), since their status may.
Rows outside any session (``session_id`` NULL) form a chain of their own.

Changing a stored value, deleting a row or inserting one in the middle breaks the chain at that row,
and :mod:`chargebook.acquire.record.verify` says which row of which table it was. The chain carries
no secret: someone who recomputes every later hash after an edit is not caught by it alone. Note or
print the head hash (``chargebook verify`` prints it) where the file cannot reach, and a rewritten
record no longer ends at it.

The sequence is also the record's order of events that does not depend on the wall clock:
replay places operator actions among the raw lines by it (a clock stepped back during a session
does not reorder them).

This module is pure (hashlib and json only) so that the migration that chains old files and the
store that chains new rows compute the same bytes.
"""

from __future__ import annotations

import hashlib
import json
import json.encoder
import math
from collections.abc import Sequence
from itertools import count
from typing import Any

#: The hash before a session's first row.
GENESIS = "0" * 64


def _names(text: str) -> tuple[str, ...]:
    return tuple(text.split())


#: The columns each chained table hashes, in this order (``chain_seq`` and ``chain_hash`` apart):
#: every column of the append-only tables, the fixed facts of sessions and reading sets.
COLUMNS: dict[str, tuple[str, ...]] = {
    "sessions": _names("id created_at metadata_json plan_json convention beam replay_of"),
    "reading_sets": _names(
        "id session_id step_index step_key purpose polarity bias_V attempt started_at"
    ),
    "readings": _names(
        "id session_id set_id seq t_s charge_nC capture settling status traffic_id recorded_at"
    ),
    "environment": _names(
        "id session_id recorded_at temperature_C pressure_kPa pressure_entered pressure_unit "
        "humidity_pct source"
    ),
    "events": _names("id session_id recorded_at actor kind detail_json account"),
    "traffic": _names("id session_id t_s recorded_at direction line"),
    "inputs": _names("id session_id recorded_at kind actor detail_json account"),
}
#: Columns stored as REAL: hashed as floats, so 1 and 1.0 hash the same as SQLite stores them.
_REAL = {
    "sessions": (),
    "reading_sets": ("bias_V",),
    "readings": ("t_s", "charge_nC"),
    "environment": ("temperature_C", "pressure_kPa", "pressure_entered", "humidity_pct"),
    "events": (),
    "traffic": ("t_s",),
    "inputs": (),
}
_REAL_INDEX = {
    table: tuple(COLUMNS[table].index(name) for name in names) for table, names in _REAL.items()
}

#: The chained tables; a session's chain runs across all of them.
CHAINED_TABLES = tuple(COLUMNS)
#: The tables chained when the chain was introduced (migration ``chain_appended_rows``), before
#: the input log (migration ``input_log``) added ``inputs``.
FIRST_CHAINED_TABLES = CHAINED_TABLES[: CHAINED_TABLES.index("inputs")]

#: The tables of calibration visits (migration ``visits``), chained with the rows outside any
#: session (chain 0): a visit spans several sessions and belongs to none. Kept apart from
#: :data:`COLUMNS`, which the migration ``chain_appended_rows`` reads as the tables of its day.
VISIT_COLUMNS: dict[str, tuple[str, ...]] = {
    "visits": _names("id uuid created_at machine metadata_json"),
    "visit_beams": _names(
        "id visit_id position name plan metadata_json register_ids_json recorded_at"
    ),
    "visit_sessions": _names("id visit_id beam_id session_id recorded_at"),
}


def columns_of(table: str) -> tuple[str, ...]:
    """Return the columns ``table`` hashes, in order (a session table or a visit table)."""
    return COLUMNS[table] if table in COLUMNS else VISIT_COLUMNS[table]


def canonical(table: str, values: Sequence[Any]) -> bytes:
    """Return the bytes hashed for one row of ``table`` (values in :data:`COLUMNS` order).

    JSON of the table name and the values, REAL columns as floats, BLOBs as hex text.
    """
    row = list(values)
    for index in _REAL_INDEX.get(table, ()):
        if row[index] is not None:
            row[index] = float(row[index])
    row = [
        value.hex() if isinstance(value, bytes | bytearray | memoryview) else value for value in row
    ]
    return _CANONICAL.encode([table, *row]).encode()


#: What ``json.dumps(..., ensure_ascii=False, separators=(",", ":"))`` uses, made once: a
#: report checks the chain of thousands of rows, and dumps would make one per row.
_CANONICAL = json.JSONEncoder(ensure_ascii=False, separators=(",", ":"))


def link(previous_hash: str, seq: int, table: str, values: Sequence[Any]) -> str:
    """Return the hash of the row at place ``seq`` of its chain, after ``previous_hash``."""
    digest = hashlib.sha256(f"{previous_hash}:{seq}:".encode())
    digest.update(canonical(table, values))
    return digest.hexdigest()


def plain_link(previous_hash: str, seq: int, table: str, values: Sequence[Any]) -> str | None:
    """Return :func:`link` of a row whose values are all text, whole numbers, finite floats or
    null (what SQLite gives back), the same bytes written without a JSON encoder: a report
    checks the chain of thousands of rows. None for any other row (call :func:`link`)."""
    real = _REAL_INDEX.get(table, ())
    parts = [f"{previous_hash}:{seq}:[{_json_text(table)}"]
    for index, value in enumerate(values):
        kind = type(value)
        if kind is str:
            parts.append(_json_text(value))
        elif value is None:
            parts.append("null")
        elif kind is int and index not in real:
            parts.append(int.__repr__(value))
        elif (kind is float or kind is int) and math.isfinite(value):
            parts.append(float.__repr__(float(value)))  # a REAL column hashes as a float
        else:
            return None
    return hashlib.sha256((",".join(parts) + "]").encode()).hexdigest()


def link_traffic(previous_hash: str, seq: int, values: Sequence[Any]) -> str:
    """Return :func:`link` for a traffic row, the same bytes built faster: raw lines may arrive
    by the ten thousand a second, and this runs once for each."""
    row_id, session_id, t_s, recorded_at, direction, line = values
    middle = _traffic_middle(session_id, t_s, recorded_at, direction)
    if middle is not None and type(line) is bytes and type(row_id) is int:
        text = f'{previous_hash}:{seq}:["traffic",{row_id}{middle}{line.hex()}"]'
        return hashlib.sha256(text.encode()).hexdigest()
    return link(previous_hash, seq, "traffic", values)


def traffic_rows(
    previous_hash: str, seq: int, first_id: int, lines: Sequence[Sequence[Any]]
) -> list[tuple[Any, ...]]:
    """Return traffic rows of one session's chain, linked on from place ``seq`` (whose hash is
    ``previous_hash``): each line (session_id, t_s, recorded_at, direction, line bytes) becomes
    (id, its columns, chain_seq, chain_hash), ids counted from ``first_id``. The same hashes as
    :func:`link_traffic` line by line, in one tight loop: a burst holds thousands of lines.

    The lines of one read share their session, time, stamp and direction (the same objects):
    the text those give the hashed bytes is made once for them, and each line adds its own id,
    place and bytes.
    """
    if not lines:
        return []
    hashes: list[str] = []
    sha256 = hashlib.sha256
    shared: tuple[Any, Any, Any, Any] | None = None  # the previous line's, compared by identity
    middle: str | None = None
    for place, row_id, (session_id, t_s, recorded_at, direction, data) in zip(
        count(seq + 1), count(first_id), lines
    ):
        if shared is None or not (
            t_s is shared[1]
            and recorded_at is shared[2]
            and direction is shared[3]
            and session_id is shared[0]
        ):
            shared = (session_id, t_s, recorded_at, direction)
            middle = _traffic_middle(session_id, t_s, recorded_at, direction)
        if middle is not None and type(data) is bytes:
            previous_hash = sha256(
                f'{previous_hash}:{place}:["traffic",{row_id}{middle}{data.hex()}"]'.encode()
            ).hexdigest()
        else:
            values = (row_id, session_id, t_s, recorded_at, direction, data)
            previous_hash = link_traffic(previous_hash, place, values)
        hashes.append(previous_hash)
    return list(
        zip(
            range(first_id, first_id + len(lines)),
            *zip(*lines, strict=True),
            range(seq + 1, seq + 1 + len(lines)),
            hashes,
            strict=True,
        )
    )


def _traffic_middle(session_id: Any, t_s: Any, recorded_at: Any, direction: Any) -> str | None:
    """Return the text between a traffic row's id and its bytes' hex in the hashed bytes (as
    :func:`link_traffic` writes it), or None when the values need the general JSON path."""
    if not (
        type(t_s) is float
        and (session_id is None or type(session_id) is int)
        and _plain_text(recorded_at)
        and _plain_text(direction)
    ):
        return None
    owner_text = "null" if session_id is None else session_id
    return f',{owner_text},{t_s!r},"{recorded_at}","{direction}","'


#: A string as JSON writes it with ``ensure_ascii=False``, quotes included (json's own).
_json_text = json.encoder.encode_basestring


def link_input(previous_hash: str, seq: int, values: Sequence[Any]) -> str:
    """Return :func:`link` for an input log row, the same bytes built without a JSON encoder
    for each row: a reading logs every sample that led to it, thousands at a time."""
    row_id, session_id, recorded_at, kind, actor, detail_json, account = values
    if not (
        type(row_id) is int
        and (session_id is None or type(session_id) is int)
        and type(recorded_at) is str
        and type(kind) is str
        and type(actor) is str
        and type(detail_json) is str
        and (account is None or type(account) is str)
    ):
        return link(previous_hash, seq, "inputs", values)
    owner_text = "null" if session_id is None else session_id
    account_text = "null" if account is None else _json_text(account)
    text = (
        f'{previous_hash}:{seq}:["inputs",{row_id},{owner_text},{_json_text(recorded_at)},'
        f"{_json_text(kind)},{_json_text(actor)},{_json_text(detail_json)},{account_text}]"
    )
    return hashlib.sha256(text.encode()).hexdigest()


def _plain_text(value: object) -> bool:
    """Return True for text that JSON writes as it is between quotes (no escapes needed)."""
    return type(value) is str and value.isprintable() and '"' not in value and "\\" not in value


def owner(table: str, values: Sequence[Any]) -> int | None:
    """Return the session a chained row belongs to (its own id for a session row; None for the
    rows of a visit, which belong to no one session)."""
    if table in VISIT_COLUMNS:
        return None
    # session_id is the second column of every other chained table
    session = values[0] if table == "sessions" else values[1]
    return None if session is None else int(session)


def chain_key(session_id: int | None) -> int:
    """Return the key of a session's chain in ``chain_heads``: its id, 0 outside sessions."""
    return 0 if session_id is None else session_id
