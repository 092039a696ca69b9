"""Fault run: the station database cannot commit for a while, in the middle of a set.

    python -m tests.faults.store_faults [--smoke]

The daemon collects a set (a long timed integration) while the simulated electrometer
(push-exponent dialect, push mode, its own stream slowed to one line per 10 s) pushes reading lines
at a steady rate, and one of three faults strikes while the lines arrive:

* disk full: the station's folder is a small tmpfs the script mounts (this needs root, as in CI
  and on the development machine; if the mount fails the case is skipped and the report says
  so); a filler file takes every free byte and is removed after ``DISK_FULL_S``;
* lock held: another process holds the database's write lock (``BEGIN IMMEDIATE``) for
  ``LOCK_S`` (10 s; longer than the daemon's 5 s busy timeout);
* concurrent writer: another process takes the write lock ten times a second, 50 ms each, for
  ``WRITER_S``, committing every time.

Counted per fault: raw lines lost (written by the simulator, not in the traffic table once the
record is writable again); whether the snapshot said "record not writable: <cause>" (every
console shows it on its status line); and a reading asked for during the fault (a manual
capture) either committed or refused in words naming the condition. Targets (issue 10): 0 lines
lost, every reading either committed or refused in words.
"""

from __future__ import annotations

import asyncio
import contextlib
import subprocess
import sys
import textwrap
import time
from collections.abc import Iterator
from pathlib import Path

from chargebook.acquire.client import DaemonClient, DaemonError, Notification
from chargebook.acquire.protocol import NOTIFY_SNAPSHOT, Method

from tests.bench import report
from tests.bench.harness import (
    QUIET_STREAM,
    Station,
    collecting_daemon,
    last_traffic_id,
    read_db,
    scratch,
    station_in,
)
from tests.faults.sessions import until

RATE_PER_S = 200
#: Fault lengths, s: (full run, smoke run). The lock is held longer than the busy timeout.
DISK_FULL_S = (10.0, 1.5)
LOCK_S = (10.0, 6.0)
WRITER_S = (10.0, 2.0)
#: Lines pushed before the fault strikes and after it is cleared, s of flood: (full run, smoke
#: run; 100 lines on each side at RATE_PER_S).
MARGIN_S = (2.0, 0.5)
TMPFS_SIZE = "24m"
NOT_WRITABLE = "record not writable"

_LOCK_HOLDER = textwrap.dedent(
    """
    import sqlite3, sys, time
    connection = sqlite3.connect(sys.argv[1], isolation_level=None, timeout=30)
    end = time.monotonic() + float(sys.argv[2])
    if sys.argv[3] == "hold":
        connection.execute("BEGIN IMMEDIATE")
        print("held", flush=True)
        time.sleep(max(0.0, end - time.monotonic()))
        connection.execute("ROLLBACK")
    else:
        print("writing", flush=True)
        while time.monotonic() < end:
            connection.execute("BEGIN IMMEDIATE")
            time.sleep(0.05)
            connection.execute("COMMIT")
            time.sleep(0.05)
    """
)


class Watch:
    """Notes, from a subscribed client's snapshots, the record's condition: now and every one
    said so far."""

    def __init__(self) -> None:
        self.message: str | None = None
        self.said: list[str] = []

    def __call__(self, note: Notification) -> None:
        if note.method == NOTIFY_SNAPSHOT and isinstance(note.params, dict):
            self.message = (note.params.get("record") or {}).get("message")
            if self.message:
                self.said.append(self.message)


@contextlib.contextmanager
def tmpfs(path: Path) -> Iterator[str | None]:
    """Mount a small tmpfs at ``path``; yield None, or why it could not be mounted."""
    done = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", f"size={TMPFS_SIZE},mode=0700", "tmpfs", str(path)],
        capture_output=True,
        text=True,
        check=False,
    )
    if done.returncode != 0:
        yield (done.stderr or done.stdout).strip() or f"mount exited {done.returncode}"
        return
    try:
        yield None
    finally:
        subprocess.run(["umount", "-l", str(path)], check=False)


def fill(folder: Path) -> Path:
    """Fill the file system of ``folder`` to its last byte; return the filler file."""
    filler = folder / "filler"
    chunk = b"\0" * 65536
    with open(filler, "wb", buffering=0) as out:
        with contextlib.suppress(OSError):
            while True:
                out.write(chunk)
        with contextlib.suppress(OSError):
            while True:
                out.write(b"\0")
    return filler


def other_writer(db: Path, seconds: float, how: str) -> subprocess.Popen[str]:
    """Start a process that holds the write lock (``hold``) or writes often (``write``)."""
    process = subprocess.Popen(
        [sys.executable, "-c", _LOCK_HOLDER, str(db), str(seconds), how],
        stdout=subprocess.PIPE,
        text=True,
    )
    assert process.stdout is not None
    process.stdout.readline()  # it holds the lock (or has begun) once it says so
    return process


async def fault_case(
    world: Station,
    client: DaemonClient,
    watch: Watch,
    name: str,
    hold_s: float,
    margin_s: float,
) -> dict:
    """Push lines, strike with fault ``name`` for ``hold_s`` after ``margin_s`` of flood, clear
    it, push ``margin_s`` more; return counts."""
    count = int(RATE_PER_S * (hold_s + 2 * margin_s))
    first_id = last_traffic_id(world.db)
    with world.bench(timeout_s=600) as bench:
        flood = asyncio.create_task(asyncio.to_thread(bench.flood, RATE_PER_S, count, wait=True))
        await asyncio.sleep(margin_s)
        started = time.monotonic()
        told, refusal = await strike(world, client, watch, name, hold_s)
        fault_s = time.monotonic() - started
        written = int((await flood)["written"])
    await until(lambda: watch.message is None, "the record to be writable again", 120)
    with contextlib.suppress(RuntimeError):  # lines still missing then are counted lost
        await until(lambda: received_since(world, first_id) >= written, "every line", 30)
    received = received_since(world, first_id)
    status = await client.status()
    return {
        "name": name,
        "written": written,
        "received": received,
        "lost": max(0, written - received),
        "told": told,
        "refusal": refusal,
        "fault_s": fault_s,
        "state": status["state"],
    }


async def strike(
    world: Station, client: DaemonClient, watch: Watch, name: str, hold_s: float
) -> tuple[str | None, str]:
    """Cause fault ``name`` for ``hold_s``; return (the condition the consoles were told of,
    what became of a reading asked for during the fault)."""
    said = len(watch.said)
    if name == "writer":
        writer = await asyncio.to_thread(other_writer, world.db, hold_s, "write")
        outcome = await ask_for_reading(client)
        await asyncio.to_thread(writer.wait)
        return (watch.said[said:] or [None])[0], outcome
    if name == "lock":
        holder = await asyncio.to_thread(other_writer, world.db, hold_s, "hold")
        filler = None
    else:
        holder, filler = None, await asyncio.to_thread(fill, world.workdir)
    try:
        await until(lambda: len(watch.said) > said, "the consoles to be told", hold_s + 30)
        told = watch.said[said]
        outcome = await ask_for_reading(client)
        if holder is not None:
            await asyncio.to_thread(holder.wait)
        else:
            await asyncio.sleep(hold_s)
    finally:
        if filler is not None:
            filler.unlink()
    return told, outcome


async def ask_for_reading(client: DaemonClient) -> str:
    """Ask for a manual capture; return "committed", "refused in words: ..." or "lost: ...".

    A committed reading completes the set: it is redone and armed again at once, so that the
    lines still to come are read (an electrometer's pushed lines are read while a set collects).
    """
    try:
        await client.call(Method.READING_CAPTURE)
    except DaemonError as error:
        if NOT_WRITABLE in str(error):
            return f"refused in words: {error}"
        return f"lost: {error}"
    # committed: the set is complete; take it again, so that the lines still pushed are read
    await client.call(Method.SET_REDO, reason="fault run: the set goes on collecting")
    await client.call(Method.STEP_ARM)
    return "committed"


def received_since(world: Station, first_id: int) -> int:
    """Return how many raw lines were received after traffic row ``first_id``."""
    sql = "SELECT count(*) FROM traffic WHERE id > ? AND direction = 'rx'"
    return int(read_db(world.db, sql, (first_id,))[0][0])


async def run_cases(world: Station, cases: list[tuple[str, float]], margin_s: float) -> list[dict]:
    """Collect a set on the station and strike it with each fault in turn."""
    client = await collecting_daemon(world)
    watch = Watch()
    client.add_listener(watch)
    await client.subscribe()
    results = []
    try:
        for name, hold_s in cases:
            results.append(await fault_case(world, client, watch, name, hold_s, margin_s))
    finally:
        await client.close()
    return results


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    pick = 1 if args.smoke else 0
    out = report.Report(
        f"record faults mid-set: disk full, a write lock held, a concurrent writer "
        f"({RATE_PER_S} lines/s pushed)",
        args.smoke,
    )
    with scratch("store-faults") as workdir, tmpfs(workdir) as mount_failure:
        cases = [("lock", LOCK_S[pick]), ("writer", WRITER_S[pick])]
        if mount_failure is None:
            cases.insert(0, ("disk full", DISK_FULL_S[pick]))
        else:
            out.note(f"disk full: SKIPPED, the tmpfs could not be mounted ({mount_failure})")
        with station_in(workdir, "push-exponent", *QUIET_STREAM) as world:
            results = asyncio.run(run_cases(world, cases, MARGIN_S[pick]))
    return summarise(out, results)


def summarise(out: report.Report, results: list[dict]) -> int:
    """Print each case's counts and the targets; return the report's exit code."""
    for case in results:
        out.note(
            f"{case['name']} ({case['fault_s']:.1f} s): {case['written']} lines written, "
            f"{case['received']} recorded, {case['lost']} lost; consoles told: "
            f"{case['told'] or 'nothing (no commit failed)'}; reading asked for during the "
            f"fault: {case['refusal']}; state after: {case['state']}"
        )
    written = sum(case["written"] for case in results)
    lost = sum(case["lost"] for case in results)
    out.baseline("raw lines written by the simulator during the faults", written, "lines")
    out.measured("raw lines recorded", written - lost, "lines")
    out.ratio((written - lost) / written if written else 0.0, "recorded / written")
    out.target("0 lines lost", lost == 0, f"{lost} lost")
    answered = [c["refusal"] == "committed" or c["refusal"].startswith("refused") for c in results]
    out.target("every reading committed or refused in words", all(answered))
    blocked = [c for c in results if c["name"] != "writer"]
    out.target(
        "the consoles are told when the record cannot commit",
        all(c["told"] and c["told"].startswith(NOT_WRITABLE) for c in blocked),
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
