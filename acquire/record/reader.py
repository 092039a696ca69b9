"""What reading a station's record takes: the read methods the reports and read commands call.

:class:`RecordReader` is the narrow read side of the record: `sessions`, `show`, `export` and
`history` (through :func:`~chargebook.acquire.reports.data.load_record`,
:func:`~chargebook.acquire.record.verify.verify_session` and the stored session's evaluation)
call these methods and nothing else. Two classes provide them, returning the same rows for the
same call: :class:`~chargebook.acquire.record.store.Store` (a station file, SQLite) and
:class:`~chargebook.acquire.record.department.DepartmentStore` (one station's sessions in the
department record, PostgreSQL). The type checker (.ci/typecheck) holds both to this protocol;
a report that needs something new from the record adds the method here and to both.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Protocol

if TYPE_CHECKING:
    from collections.abc import Iterable

    from chargebook.acquire.record import store


class RecordReader(Protocol):
    """The read methods of one station's record (rows oldest first unless said otherwise)."""

    def station(self) -> store.StationRow:
        """Return the station that keeps the record (its UUID and name)."""
        ...

    def sessions(self) -> list[store.SessionRow]:
        """Return every session, oldest first."""
        ...

    def listed_sessions(self) -> list[store.ListedSession]:
        """Return every session, oldest first, as a listing shows it: without its stored
        metadata and plan, with the names its metadata holds."""
        ...

    def sessions_of(self, session_ids: Iterable[int]) -> list[store.SessionRow]:
        """Return the sessions ``session_ids`` (those recorded), oldest first."""
        ...

    def session(self, session_id: int) -> store.SessionRow:
        """Return one session; :class:`~chargebook.acquire.record.store.NotFound` if missing."""
        ...

    def sets(self, session_id: int) -> list[store.SetRow]:
        """Return the session's reading sets (superseded attempts included)."""
        ...

    def readings(self, session_id: int, set_id: int | None = None) -> list[store.ReadingRow]:
        """Return the session's readings (of one set if ``set_id`` is given)."""
        ...

    def session_names(self) -> dict[int, dict[str, str | None]]:
        """Return, per session id, the machine, beam and operator its metadata names (the keys
        it holds of ``store.NAMED_KEYS``); a session left out is read from its metadata."""
        ...

    def session_visits(self) -> dict[int, tuple[int, int]]:
        """Return, per session measuring a beam of a calibration visit, (the visit's id, the
        beam's position in it); a session of no visit is left out."""
        ...

    def set_counts(self) -> dict[int, tuple[int, int]]:
        """Return, per session id, (its reading sets, those accepted)."""
        ...

    def reading_counts(self) -> dict[int, int]:
        """Return, per session id, how many readings it holds."""
        ...

    def events_of_kind(self, kind: str) -> dict[int | None, list[store.EventRow]]:
        """Return the events of one kind by session id (None: outside any session)."""
        ...

    def session_results(
        self, session_ids: Iterable[int] | None = None
    ) -> dict[int, tuple[str, str]]:
        """Return the kept results of closed sessions (of ``session_ids``; None: all): session
        id -> (evaluation stamp, JSON); a record that keeps none returns {} (each session is
        then evaluated live)."""
        ...

    def readings_by_set(self, session_id: int) -> dict[int, tuple[store.ReadingRow, ...]]:
        """Return the session's readings by set id, oldest first within a set."""
        ...

    def environment(self, session_id: int) -> list[store.EnvironmentRow]:
        """Return the session's environment entries (the last one is current)."""
        ...

    def events(self, session_id: int | None) -> list[store.EventRow]:
        """Return the session's events (``None``: events outside any session)."""
        ...

    def traffic(self, session_id: int | None) -> list[store.TrafficRow]:
        """Return the session's raw instrument traffic in the order recorded."""
        ...

    def traffic_count(self, session_id: int | None) -> int:
        """Return how many raw instrument lines were recorded for the session."""
        ...

    def chained_rows(
        self, table: str, session_id: int | None, after_seq: int = 0
    ) -> list[tuple[Any, ...]]:
        """Return the rows of the chained ``table`` of the session past place ``after_seq``:
        the chain's columns (``chain.COLUMNS[table]``), then its place and hash."""
        ...

    def chain_head(self, session_id: int | None) -> tuple[int, str] | None:
        """Return (place, hash) of the last row recorded in the session's chain, or None."""
        ...
