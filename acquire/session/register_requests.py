"""The daemon's register requests (``register.list``, ``register.add``,
``register.supersede``): the params of :data:`chargebook.acquire.protocol.METHODS` in, JSON-ready
rows out. The daemon is the single writer while it runs, so a client adds rows through it."""

from __future__ import annotations

import datetime
from collections.abc import Callable
from typing import Any

from chargebook.acquire import protocol
from chargebook.acquire.record.registers import RegisterRow, register_rows
from chargebook.acquire.record.store import Store
from chargebook.acquire.session.register_rows import add_row, row_name, select, supersede_row
from chargebook.corrections.stability import Thresholds


def named(store: Store, row: RegisterRow) -> dict[str, Any]:
    """Return a row as JSON-ready data with its name in words (``name``)."""
    return {**row.to_dict(), "name": row_name(store, row)}


def list_rows(
    store: Store, params: dict[str, Any], actor: str, thresholds: Thresholds
) -> dict[str, Any]:
    """Return ``{rows: [...]}``: the current rows (of ``kind``; superseded ones too if asked)."""
    rows = register_rows(
        store, params.get("kind"), include_superseded=bool(params.get("include_superseded"))
    )
    return {"rows": [named(store, row) for row in rows]}


def add(store: Store, params: dict[str, Any], actor: str, thresholds: Thresholds) -> dict[str, Any]:
    """Add a register entry; return its first row."""
    row = add_row(
        store,
        params["kind"],
        params["fields"],
        actor=actor,
        effective_from=params.get("effective_from"),
    )
    return named(store, row)


def supersede(
    store: Store, params: dict[str, Any], actor: str, thresholds: Thresholds
) -> dict[str, Any]:
    """Supersede a register row; return the new row."""
    row = supersede_row(
        store,
        params["row"],
        params["fields"],
        actor=actor,
        reason=params["reason"],
        effective_from=params.get("effective_from"),
    )
    return named(store, row)


def pick(
    store: Store, params: dict[str, Any], actor: str, thresholds: Thresholds
) -> dict[str, Any]:
    """Return what a session naming these rows would be given (ids, metadata, warnings)."""
    picked = select(
        store,
        params["registers"],
        on=datetime.datetime.now(datetime.UTC).date(),
        validity_years=thresholds.certificate_validity_years,
    )
    return {
        "registers": picked.ids(),
        "fields": picked.metadata_fields(),
        "warnings": picked.warnings(),
    }


Handler = Callable[[Store, dict[str, Any], str, Thresholds], dict[str, Any]]
#: Method name -> handler(store, params, actor, the daemon's thresholds).
REGISTER_METHODS: dict[str, Handler] = {
    protocol.Method.REGISTER_LIST: list_rows,
    protocol.Method.REGISTER_ADD: add,
    protocol.Method.REGISTER_SUPERSEDE: supersede,
    protocol.Method.REGISTER_PICK: pick,
}
