"""Benchmark: publishing a station's recorded sessions into the department record (PostgreSQL).

    python -m tests.bench.publish [--smoke]

A station file holding 10,000 finished sessions (the invented example worksheet of the Example
Clinic, fictional, recorded through the Store API; 50 in the smoke run) is published into an
empty department database on a private PostgreSQL server from Debian's packages
(``tests/acquire/postgres_server.py``: a Unix socket, fsync off, as the tests run it).

* Measured: ``chargebook publish``'s work (``department.publish_station``): one transaction per
  session, its chain read from the station file past the place already published.
* Baseline: the same rows copied in one transaction (PostgreSQL's COPY, as publish uses) into
  a second empty department database, without the per-session transactions and the chain
  bookkeeping: the floor cost of moving the rows.
* Then the same publish again, which must add nothing, and quickly.

Targets: at least 100 sessions/s (10,000 sessions, years of a station's record, in under two
minutes), at least 0.3 of the bulk copy's rate, and a second publish that adds no row and takes
under a tenth of the first.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

from chargebook.acquire.record import department
from chargebook.acquire.record.store import Store

from tests.acquire.postgres_server import running_server
from tests.acquire.recorded_session import record_example_session
from tests.bench import report

FULL_SESSIONS = 10_000
SMOKE_SESSIONS = 50
#: Sessions recorded per commit while building the station file (only to build it faster).
BUILD_BATCH = 100
RATE_TARGET = 100.0
RATIO_TARGET = 0.3
REPUBLISH_FRACTION = 0.1


def build_station(path: Path, sessions: int) -> None:
    """Record ``sessions`` finished example sessions in a new station file."""
    with Store.open(path) as store:
        for start in range(0, sessions, BUILD_BATCH):
            with store.atomic():
                for _ in range(min(BUILD_BATCH, sessions - start)):
                    record_example_session(store)


def bulk_copy(store: Store, database: department.DepartmentDatabase) -> int:
    """Copy every session's rows in one transaction; return how many rows."""
    station = store.station()
    rows = 0
    with database.transaction() as cursor:
        cursor.execute(
            f"INSERT INTO {department.SCHEMA}.stations (uuid, created_at) VALUES (%s, %s)",
            (station.uuid, station.created_at),
        )
        for table in department.ROW_CLASSES:
            # what publish copies: every session's rows, and the events outside sessions
            where = "session_id IS NOT NULL" if table == "traffic" else "1"
            found = department.station_rows(store, table, where, ())
            rows += department.copy_rows(cursor, table, station.uuid, found)
    return rows


def _timed(call):
    started = time.perf_counter()
    result = call()
    return time.perf_counter() - started, result


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    sessions = SMOKE_SESSIONS if args.smoke else FULL_SESSIONS
    out = report.Report(f"publish: {sessions} recorded sessions into PostgreSQL", args.smoke)
    with tempfile.TemporaryDirectory(prefix="chargebook-bench-") as folder:
        path = Path(folder) / "station.sqlite"
        build_s, _ = _timed(lambda: build_station(path, sessions))
        out.note(f"station file built in {build_s:.1f} s")
        with running_server() as server, Store.open(path, read_only=True) as store:
            bulk_url = server.new_database("bulk")
            publish_url = server.new_database("published")
            for url in (bulk_url, publish_url):
                with department.open_department(url, require_record=False) as database:
                    department.create_schema(database)
            with department.open_department(bulk_url) as database:
                bulk_s, bulk_rows = _timed(lambda: bulk_copy(store, database))
            with department.open_department(publish_url) as database:
                first_s, first = _timed(lambda: department.publish_station(store, database))
                again_s, again = _timed(lambda: department.publish_station(store, database))
    out.note(f"{first.rows} rows published, {bulk_rows} copied in bulk; again: {again.rows}")
    if first.sessions_published != sessions or first.rows != bulk_rows:
        raise SystemExit(f"published {first.sessions_published} sessions, {first.rows} rows")
    rate, bulk_rate = sessions / first_s, sessions / bulk_s
    out.baseline("the same rows copied in one transaction", bulk_rate, "sessions/s")
    out.measured("publish, one transaction per session", rate, "sessions/s")
    out.measured("publish again (nothing new)", again_s, "s")
    out.ratio(rate / bulk_rate, "measured / baseline")
    out.target(
        f"at least {RATE_TARGET:g} sessions/s",
        rate >= RATE_TARGET,
        f"{rate / RATE_TARGET:.0%} of it",
    )
    out.target(
        f"at least {RATIO_TARGET:g} of the bulk copy's rate",
        rate / bulk_rate >= RATIO_TARGET,
        f"{rate / bulk_rate / RATIO_TARGET:.0%} of it",
    )
    out.target(
        f"publishing again adds no row, in under {REPUBLISH_FRACTION:g} of the first's time",
        again.rows == 0 and again_s < REPUBLISH_FRACTION * first_s,
        f"{again.rows} rows, {again_s / first_s:.0%} of the time",
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
