"""Writing a finished replay into the station database, all of it in one transaction.

A replay runs the whole pipeline against a scratch store in memory, so that one which fails
part-way (a corrupted traffic log, a replay that does not follow its recording) writes nothing
to the station database, and so that a daemon writing to the same file is never kept waiting
longer than the copy takes. :func:`copy_session` then writes the session, its reading sets,
traffic, readings, environment entries and events in one transaction, with ``replay_of`` set,
giving every row the next free id and rewriting the ids that rows and event details refer to.
The rows are copied in the order of their session's hash chain and chained anew in the
copy (their ids and session changed, so their hashes do too).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.store import Store

#: Copied tables, with the columns that refer to rows of other copied tables. Rows are copied
#: in their chain's order, where every reference is to an earlier row.
TABLES: tuple[tuple[str, dict[str, str]], ...] = (
    ("sessions", {}),
    ("reading_sets", {"session_id": "sessions"}),
    ("traffic", {"session_id": "sessions"}),
    ("readings", {"session_id": "sessions", "set_id": "reading_sets", "traffic_id": "traffic"}),
    ("environment", {"session_id": "sessions"}),
    ("events", {"session_id": "sessions"}),
)
#: Event detail keys that hold the id of a copied row, and that row's table.
DETAIL_IDS = {"set_id": "reading_sets", "reading_id": "readings", "environment_id": "environment"}


def copy_session(source: Store, session_id: int, target: Store, replay_of: int) -> int:
    """Copy session ``session_id`` of ``source`` into ``target`` as a replay of ``replay_of``
    and return its id there. Nothing is written unless everything is (one transaction)."""
    target.session(replay_of)  # NotFound before anything is written
    new_ids: dict[str, dict[int, int]] = {table: {} for table, _ in TABLES}
    references = dict(TABLES)
    rows = [(table, row) for table, _ in TABLES for row in _rows(source, table, session_id)]
    rows.sort(key=lambda item: item[1].pop("chain_seq"))  # the chain's order
    with target.atomic():
        for table, row in rows:
            old_id = row.pop("id")
            row.pop("chain_hash")
            for column, other in references[table].items():
                if row[column] is not None:
                    row[column] = new_ids[other][row[column]]
            _fix_row(table, row, replay_of, lambda t, i: new_ids[t].get(i, i))
            new_ids[table][old_id] = target.append_row(table, row)
    return new_ids["sessions"][session_id]


def _rows(store: Store, table: str, session_id: int) -> list[dict[str, Any]]:
    where = "id = ?" if table == "sessions" else "session_id = ?"
    cursor = store.db.execute(f"SELECT * FROM {table} WHERE {where} ORDER BY id", (session_id,))
    names = [d[0] for d in cursor.description]
    return [dict(zip(names, values, strict=True)) for values in cursor.fetchall()]


def _fix_row(
    table: str, row: dict[str, Any], replay_of: int, new_id: Callable[[str, int], int]
) -> None:
    """Set ``replay_of`` on the session and rewrite the ids event details refer to."""
    if table == "sessions":
        row["replay_of"] = replay_of
    if table == "events":
        detail = json.loads(row["detail_json"])
        for key, other in DETAIL_IDS.items():
            if isinstance(detail.get(key), int):
                detail[key] = new_id(other, detail[key])
        if row["kind"] == EventKind.SESSION_CREATED:
            detail["replay_of"] = replay_of
        row["detail_json"] = json.dumps(detail, sort_keys=True, allow_nan=False, ensure_ascii=False)
