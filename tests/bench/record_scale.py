"""Benchmark: the read commands on a station file of ten years of daily output checks.

    python -m tests.bench.record_scale [--smoke] [--files DIR]

A station file is generated through the store API (in this process, with a clock that moves
one day at a time): ten years of daily output checks (the shipped ``monthly-check`` plan: a
warm-up reading, then a settling reading and three routine readings, k_pol and k_s carried) on
each of four machines, about 14,600 sessions, every one finished, its result kept in the
record as it closed (as the daemon keeps it: ``acquire/session/stored_result.py``). A session of
500 reading sets (``tests.bench.session_length``: a set taken and redone) is added to another
file. The readings and air data are invented (demo only: Example Clinic (fictional)).

Each command runs as a user runs it (``chargebook ...``, a new process), alternating with its
baseline, a new Python process that runs a bare SQL query of the same rows on the same file
(sqlite3, read-only) and prints them; the medians of the wall times are compared.

* ``chargebook sessions``: every session; baseline, the sessions' rows.
* ``chargebook history --beam "6 MV" --machine DEMO-LA1 --no-plot``: one machine's ten years;
  baseline, the sessions of that beam and machine with their readings.
* ``chargebook export ID --format html`` of the 500-set session: under 1 s (no baseline ratio:
  the issue sets an absolute bound).

``--files DIR`` keeps the two files in DIR and uses them again in a later run (generating
takes minutes), as long as the station file holds the sessions of this run and each of its
kept results bears the running evaluation's stamp (else history would evaluate them live):
otherwise both are generated again.

Targets (issue 17, target 6): ``sessions`` and ``history`` each under 1 s and within 5 times
their baseline; the HTML report under 1 s.
"""

from __future__ import annotations

import contextlib
import os
import resource
import sqlite3
import subprocess
import sys
import time
from contextlib import closing
from datetime import UTC, datetime, timedelta
from pathlib import Path

from chargebook.acquire.commands.demo_data import demo_metadata
from chargebook.acquire.record.store import Store
from chargebook.acquire.session import rules
from chargebook.acquire.session.stored_result import evaluation_stamp, stored_row

from tests.bench import report
from tests.bench.harness import scratch
from tests.bench.session_length import record_sets
from tests.bench.startup import chargebook_help_command

MACHINES = ("DEMO-LA1", "DEMO-LA2", "DEMO-LA3", "DEMO-LA4")
FULL_DAYS, SMOKE_DAYS = 3650, 20
FULL_SETS, SMOKE_SETS = 500, 20
FULL_RUNS, SMOKE_RUNS = 3, 1
TARGET_S = 1.0
TARGET_RATIO = 5.0
LONG_SESSION_ID = 1  # the long session is the only one of its file
FIRST_DAY = datetime(2016, 1, 4, 7, 30, tzinfo=UTC)
#: Invented carried factors (demo only), as an annual calibration of the same chamber would give.
CARRIED = {
    "carried_k_pol": {
        "value": 1.0011,
        "source": "annual calibration (invented)",
        "date": "2016-01-02",
    },
    "carried_k_s": {
        "value": 1.0042,
        "source": "annual calibration (invented)",
        "date": "2016-01-02",
    },
}
HISTORY_QUERY = """
SELECT s.id, s.created_at, s.status, s.beam, s.metadata_json, r.id, r.set_id, r.charge_nC
FROM sessions s JOIN readings r ON r.session_id = s.id
WHERE s.beam = ? AND json_extract(s.metadata_json, '$.treatment_machine') = ?
ORDER BY s.id, r.id
"""
SESSIONS_QUERY = "SELECT id, created_at, status, beam, metadata_json FROM sessions ORDER BY id"
BARE = """
import sqlite3, sys
connection = sqlite3.connect(f"file:{sys.argv[1]}?mode=ro", uri=True)
for row in connection.execute(sys.argv[2], tuple(sys.argv[3:])):
    print(*row)
"""


class DayClock:
    """The store's clock: a given day at 07:30 UTC, moved on by a second per call."""

    def __init__(self) -> None:
        self.now = FIRST_DAY

    def __call__(self) -> datetime:
        self.now += timedelta(seconds=1)
        return self.now


def record_output_check(store: Store, machine: str, day: int) -> int:
    """Record one finished output check of ``machine`` through the store API; return its id."""
    metadata = rules.validate_metadata(
        {**demo_metadata(), **CARRIED, "treatment_machine": machine, "operator": "operator A"}
    )
    plan = rules.resolve_plan("monthly-check")
    session_id = store.create_session(
        metadata, plan.to_dict(), metadata["convention"], metadata["beam"], actor="operator A"
    )
    # invented air data and charges (demo only): about 20 nC per 100 MU
    store.add_environment(session_id, 21.0 + day % 3 * 0.5, 101.1, 101.1, "kPa", None, "operator")
    charges = {"warmup": (60.2,), "routine": (20.11, 20.05, 20.06 + day % 5 * 0.01, 20.07)}
    for index, step in enumerate(plan.steps):
        set_id = store.add_set(session_id, index, step.key, step.purpose, 1, float(step.bias_V), 1)
        for seq, charge_nC in enumerate(charges[step.purpose], start=1):
            settling = step.purpose == "routine" and seq == 1
            store.add_reading(
                session_id, set_id, seq, 10.0 * seq, charge_nC, "pushed", settling, "ok"
            )
        store.set_set_status(set_id, "reviewing", actor="operator A")
        store.set_set_status(set_id, "accepted", actor="operator A")
    store.set_session_status(session_id, "finished", "plan complete", actor="operator A")
    return session_id


def record_years(db: Path, days: int) -> int:
    """Record ``days`` days of output checks on every machine; return the number of sessions."""
    clock = DayClock()
    with Store.open(db, now=clock) as store:
        store.results_on_close = stored_row  # kept as each session closes, as by the daemon
        for day in range(days):
            clock.now = FIRST_DAY + timedelta(days=day)
            with store.atomic():  # one commit a day: generating, not measuring
                for machine in MACHINES:
                    record_output_check(store, machine, day)
    return days * len(MACHINES)


def kept_files(db: Path, long_db: Path, sessions: int) -> bool:
    """Return True when ``db`` holds ``sessions`` sessions, each with its result kept under
    the running evaluation's stamp, and ``long_db`` exists: a run may use them again."""
    if not (db.is_file() and long_db.is_file()):
        return False
    with closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True)) as connection:
        (held,) = connection.execute("SELECT count(*) FROM sessions").fetchone()
        (current,) = connection.execute(
            "SELECT count(*) FROM session_results WHERE stamp = ?", (evaluation_stamp(),)
        ).fetchone()
    return held == current == sessions


def station_files(folder: Path, days: int, sets: int, out: report.Report) -> tuple[Path, Path, int]:
    """Generate the station file and the long session's file in ``folder`` (unless a previous
    run's are there and current: :func:`kept_files`); return their paths and the long
    session's id."""
    db, long_db = folder / "station.sqlite", folder / "long.sqlite"
    sessions = days * len(MACHINES)
    if kept_files(db, long_db, sessions):
        out.note(f"{sessions} sessions of a previous run, in {folder}")
        return db, long_db, LONG_SESSION_ID
    for path in folder.glob("*.sqlite*"):
        path.unlink()
    started = time.perf_counter()
    record_years(db, days)
    long_id = record_sets(long_db, sets - 1)
    assert long_id == LONG_SESSION_ID  # the only session of its file
    out.note(f"{sessions} sessions generated in {time.perf_counter() - started:.0f} s")
    return db, long_db, long_id


def wall_s(command: list[str]) -> tuple[float, float]:
    """Return the wall time and the CPU time (user and system) of one run of ``command`` (it
    must succeed), in seconds. The CPU time says what the command costs whatever the load: on
    a shared machine the wall time is mostly waiting for a core.

    Python may keep compiled bytecode (``__pycache__``), as an installed chargebook has it (pip
    compiles it on install): a shell with PYTHONDONTWRITEBYTECODE set would otherwise compile
    every module from source on every run, which no user's installation does.
    """
    env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    started = time.perf_counter()
    subprocess.run(
        command, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env
    )
    wall = time.perf_counter() - started
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime
    return wall, cpu


def medians(commands: list[list[str]], runs: int) -> list[tuple[float, float]]:
    """Return the median wall and CPU times of each command, the commands run in turn ``runs``
    times."""
    for command in commands:
        wall_s(command)  # warm the file cache once
    times: list[list[tuple[float, float]]] = [[] for _ in commands]
    for _ in range(runs):
        for spent, command in zip(times, commands, strict=True):
            spent.append(wall_s(command))
    return [
        (report.median([w for w, _ in spent]), report.median([c for _, c in spent]))
        for spent in times
    ]


def main(argv: list[str] | None = None) -> int:
    parser = report.parser(__doc__.splitlines()[0])
    parser.add_argument(
        "--files",
        metavar="DIR",
        type=Path,
        help="keep the generated files here, and use them again when current",
    )
    args = parser.parse_args(argv)
    days, sets, runs = (
        (SMOKE_DAYS, SMOKE_SETS, SMOKE_RUNS) if args.smoke else (FULL_DAYS, FULL_SETS, FULL_RUNS)
    )
    chargebook = chargebook_help_command()[:-1]
    out = report.Report(
        f"the record at scale: {days} days of output checks on {len(MACHINES)} machines, "
        f"a session of {sets} sets; medians of {runs} runs",
        args.smoke,
    )
    with contextlib.ExitStack() as stack:
        if args.files is None:
            workdir = stack.enter_context(scratch("record-scale"))
        else:
            workdir = args.files
            workdir.mkdir(parents=True, exist_ok=True)
        db, long_db, long_id = station_files(workdir, days, sets, out)
        bare = [sys.executable, "-c", BARE, str(db)]
        (listing, listing_cpu), (listing_bare, listing_bare_cpu) = medians(
            [[*chargebook, "sessions", "--db", str(db)], [*bare, SESSIONS_QUERY]], runs
        )
        history_command = [*chargebook, "history", "--beam", "6 MV", "--machine", MACHINES[0]]
        (history, history_cpu), (history_bare, history_bare_cpu) = medians(
            [
                [*history_command, "--no-plot", "--db", str(db)],
                [*bare, HISTORY_QUERY, "6 MV", MACHINES[0]],
            ],
            runs,
        )
        html_command = [*chargebook, "export", str(long_id), "--format", "html"]
        ((html, html_cpu),) = medians(
            [[*html_command, "-o", str(workdir / "r.html"), "--db", str(long_db)]], runs
        )
    out.baseline("bare SQL of the sessions' rows (median)", listing_bare * 1000, "ms")
    out.measured("chargebook sessions (median)", listing * 1000, "ms")
    out.baseline(
        "bare SQL of one machine's 6 MV sessions and readings (median)", history_bare * 1000, "ms"
    )
    out.measured(
        "chargebook history --beam '6 MV' --machine DEMO-LA1 (median)", history * 1000, "ms"
    )
    out.measured(
        f"chargebook export --format html of the {sets}-set session (median)", html * 1000, "ms"
    )
    out.note(
        f"CPU time, user + system (median; wall time on a loaded machine is mostly waiting): "
        f"sessions {listing_cpu * 1000:.0f} ms (its bare SQL {listing_bare_cpu * 1000:.0f} ms), "
        f"history {history_cpu * 1000:.0f} ms (its bare SQL {history_bare_cpu * 1000:.0f} ms), "
        f"HTML report {html_cpu * 1000:.0f} ms"
    )
    out.ratio(listing / listing_bare, "sessions / its bare SQL")
    out.ratio(history / history_bare, "history / its bare SQL")
    for name, spent, ratio in (
        ("sessions", listing, listing / listing_bare),
        ("history", history, history / history_bare),
    ):
        out.target(f"{name} under {TARGET_S:g} s", spent < TARGET_S, f"{spent:.2f} s")
        out.target(
            f"{name} within {TARGET_RATIO:g} x its bare SQL",
            ratio <= TARGET_RATIO,
            f"{ratio:.1f} x",
        )
    out.target(
        f"HTML report of the {sets}-set session under {TARGET_S:g} s",
        html < TARGET_S,
        f"{html:.2f} s",
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
