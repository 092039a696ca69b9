"""Benchmark: `chargebook replay --visit ID --speed 0` of a recorded 4-hour visit, against the
pty alone.

    python -m tests.bench.replay [--smoke]

A calibration visit of nine beams of the fictional clinic's DEMO-LA1 (invented demo data; six
full calibrations and three output checks, one session each) is recorded by the real daemon
(``Daemon``: its engine, its store on a real SQLite file, its instrument thread and its
``query-plain`` driver, polling every 0.05 s while a reading is taken) with the simulated
electrometer on an in-memory wire and a hand clock (``tests/acquire/in_process_daemon.py``),
so that four hours of the daemon's clock take a few minutes. The physicist's set-up time
between beams is idle time on that clock. The visit records about 10^5 raw traffic lines and
the input log a replay feeds back.

* Baseline: the same raw lines of the whole visit (both directions, as recorded) written to a
  real pseudo-terminal as fast as a reader takes them, and read by one new Python process with
  pyserial (``readline`` on an ``io.BufferedReader`` over the port, timeout 0.05 s, as in the
  pipeline benchmark), timed from its start to its exit. Also shown, as the earlier figures
  were measured: each session's lines read by a process of its own, the nine times summed.
* The floor of a replay that must query: a query-mode recording is played by answering each
  poll, so a replay cannot push its lines one way. The same visit's queries sent one at a time
  with bare pyserial (``write``, then ``read`` of the bytes waiting until the recorded answer
  is whole: no parsing, no store) to the same playback simulator on a real pty, answered in
  the same thread as the replay's are at speed 0, by one new process timed from its start to
  its exit (about 55,000 round trips for the full visit). The replay's ratio against it is
  printed beside the target's. (The replay keeps runs of polls in flight, one write and one
  read a run, so its own traffic through the pty costs less than these round trips.)
* Measured: ``chargebook replay --visit ID --speed 0 --json`` as a user runs it for the visit
  (one new process: the playback simulator on a real pty, the real driver, engine and store,
  each replay stored in the station file), timed from its start to its exit, with its CPU time;
  it must say ``reproduced`` for every session, or the run fails.

All run with Python's default of caching compiled bytecode (an installed copy has its
bytecode; an editable one under ``PYTHONDONTWRITEBYTECODE`` would compile every module at every
start), after one untimed run of each.

Rounds alternate them. Target (issue 17, target 5): the visit's replay within 3 times the
time to push the same lines through the pty alone.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime
import json
import os
import pickle
import resource
import subprocess
import sys
import time
import tty
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from chargebook.acquire.commands.demo_data import DEMO_METADATA, demo_visit_beams
from chargebook.acquire.daemon.daemon import POLL_INTERVAL_S
from chargebook.acquire.processes import chargebook_args
from chargebook.acquire.replay.recording import RecordedLine
from chargebook.acquire.replay.traffic import TX, line_text
from chargebook.drivers_generic import load_profile

from tests.acquire.in_process_daemon import InProcessDaemon, running
from tests.bench import report
from tests.bench.harness import read_db, scratch

#: The visit's beams, the demo visit's three (6 MV full, 10 MV output check, electrons full) over
#: and over.
FULL_BEAMS, SMOKE_BEAMS = 9, 1
#: The visit's length on the daemon's clock, s: the set-up time between beams makes it up.
FULL_VISIT_S, SMOKE_VISIT_S = 4 * 3600.0, 1800.0
PROFILE = "query-plain"
FULL_ROUNDS, SMOKE_ROUNDS = 3, 1
TARGET_RATIO = 3.0
#: The longest a replay or a reader may take before the run is given up, s.
GIVE_UP_S = 600.0

#: The baseline's reader process: pyserial, buffered readline, until COUNT lines.
READER = """
import io, sys, serial
port = serial.Serial(sys.argv[1], baudrate=115200, timeout=0.05)
reader = io.BufferedReader(port, 65536)
print("open", flush=True)
count = int(sys.argv[2])
received = 0
while received < count:  # a line cut by the timeout is counted once, when its end comes
    received += reader.readline().endswith(b"\\n")
"""


#: The floor's process: the playback simulator on a pty in this process (answering in turn, as
#: at speed 0), each recorded query written with pyserial and its recorded answer read back
#: whole, one round trip at a time. argv: the pickled sessions, the profile's name.
ROUND_TRIPS = """
import pickle, sys, serial
from chargebook.drivers_generic import load_profile
from chargebook.drivers_generic.simulator.playback import playback_port
framing = load_profile(sys.argv[2]).framing
with open(sys.argv[1], "rb") as file:
    sessions = pickle.load(file)
wrong = 0
for entries, exchanges in sessions:
    with playback_port(entries, framing, "query", 0) as port:
        link = serial.Serial(str(port.path), baudrate=115200, timeout=2.0)
        for query, answer in exchanges:
            link.write(query)
            port.answer(1)
            got = b""
            while len(got) < len(answer):
                got += link.read(max(link.in_waiting, 1))
            wrong += got != answer
        link.close()
sys.exit(1 if wrong else 0)
"""


@dataclass(frozen=True)
class Timed:
    """A timed process: its wall time and the CPU time (user + system) it used, s."""

    wall_s: float
    cpu_s: float


@dataclass(frozen=True)
class Recorded:
    """One session of the visit: its id, raw traffic lines (bytes, terminators kept) and each
    line's direction (``tx`` sent, ``rx`` received)."""

    session_id: int
    lines: tuple[bytes, ...]
    directions: tuple[str, ...]


# ---------------------------------------------------------------------------- recording
def record_visit(db: Path, beams: int, visit_s: float) -> list[Recorded]:
    """Record a visit of ``beams`` beams lasting ``visit_s`` on the daemon's clock into ``db``;
    return its sessions, in the order measured."""
    asyncio.run(_record(db, beams, visit_s))
    sessions = read_db(db, "SELECT id FROM sessions ORDER BY id")
    found = []
    for (session_id,) in sessions:
        sql = "SELECT line, direction FROM traffic WHERE session_id = ? ORDER BY id"
        rows = read_db(db, sql, (session_id,))
        found.append(
            Recorded(
                int(session_id),
                tuple(bytes(line) for line, _ in rows),
                tuple(direction for _, direction in rows),
            )
        )
    return found


#: Names of the beams past the demo's own three, by the demo beam they repeat (invented).
MORE_BEAMS = {
    "6 MV": ("15 MV", "18 MV"),
    "10 MV": ("6 MV FFF", "10 MV FFF"),
    "10 MeV": ("12 MeV", "15 MeV"),
}


def visit_beams(demo: list[tuple[dict[str, Any], str]], beams: int) -> list[tuple[dict, str]]:
    """Return ``beams`` beams: the demo visit's three, then the same measurements of further
    beams of the machine under their own names (a visit measures each beam once). One beam
    alone is the short output check (the smoke run)."""
    if beams == 1:
        return [demo[1]]
    found = []
    for number in range(beams):
        metadata, plan = demo[number % len(demo)]
        repeat = number // len(demo)
        if repeat:
            name = MORE_BEAMS[metadata["beam"]][repeat - 1]
            metadata = {**metadata, "beam": name}
            if name.endswith("MeV"):  # E0 = 2.33 MeV/cm x R50 (common practice)
                mev = float(name.split()[0])
                metadata |= {"beam_quality": f"{name} electrons", "R50_cm": round(mev / 2.33, 1)}
        found.append((metadata, plan))
    return found


async def _record(db: Path, beams: int, visit_s: float) -> None:
    daemon = InProcessDaemon(db.parent, profile=PROFILE, plan="default", time_scale=1.0)
    started_s = daemon.time()
    async with running(daemon):
        clock = asyncio.create_task(_run_time(daemon))
        client, operator = await daemon.operator()
        truth = daemon.sim.device.truth()
        demo = demo_visit_beams(truth, datetime.date.today().isoformat())
        visit = visit_beams(demo, beams)
        # The physicist's set-up between beams: idle time, spread so the visit lasts visit_s.
        # Each gap is taken before a beam, from what is left of the visit's time.
        begun: list[int] = []

        def set_up(metadata: dict[str, Any], plan: str) -> None:
            begun.append(1)
            if len(begun) > 1:
                left_s = visit_s - (daemon.time() - started_s)
                daemon.time.advance(max(0.0, left_s / (beams - len(begun) + 2)))

        try:
            await operator.run_visit(
                DEMO_METADATA["treatment_machine"], DEMO_METADATA["operator"], visit, set_up
            )
            left_s = visit_s - (daemon.time() - started_s)
            daemon.time.advance(max(0.0, left_s))
        finally:
            await client.close()
            clock.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await clock


async def _run_time(daemon: InProcessDaemon) -> None:
    """Move the hand clock on one poll interval at a time, as ``let_time_run`` does, and wake
    the instrument thread at each step: in query mode it waits for its next poll on a real
    timer, which would make each poll of the hand clock last 0.05 s of wall time."""
    assert daemon.link is not None
    while True:
        now_s = daemon.time.advance(POLL_INTERVAL_S)
        daemon.link.inbox.put(("", None))  # an empty post: nothing to do, then poll if due
        await daemon.caught_up(now_s)


# ----------------------------------------------------------------------------- the baseline
def children_env(workdir: Path) -> dict[str, str]:
    """Return the environment of the timed processes: Python's own default of caching the
    bytecode it compiles (kept in ``workdir``), as an installed copy has it, even where the
    shell says not to write bytecode (``PYTHONDONTWRITEBYTECODE``)."""
    env = {**os.environ, "PYTHONPYCACHEPREFIX": str(workdir / "pycache")}
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    return env


def pty_alone(lines: list[bytes], env: dict[str, str]) -> Timed:
    """Return the wall and CPU time of a new process reading ``lines`` from a pty.

    The reader says when its port is open (pyserial empties the port's input on opening);
    the lines are then written to the pty's near end as fast as they are read.
    """
    master, slave = os.openpty()
    tty.setraw(slave)
    try:
        cpu_before = _children_cpu_s()
        started = time.perf_counter()
        reader = subprocess.Popen(
            [sys.executable, "-c", READER, os.ttyname(slave), str(len(lines))],
            stdout=subprocess.PIPE,
            env=env,
        )
        assert reader.stdout is not None
        if reader.stdout.readline() != b"open\n":
            reader.kill()
        _write_all(master, b"".join(lines))
        status = reader.wait(timeout=GIVE_UP_S)
        elapsed = time.perf_counter() - started
        reader.stdout.close()
    finally:
        os.close(master)
        os.close(slave)
    if status != 0:
        raise RuntimeError(f"the pty reader failed: exit {status}")
    return Timed(elapsed, _children_cpu_s() - cpu_before)


def _children_cpu_s() -> float:
    """Return the CPU time (user + system) of the waited-for children so far, s."""
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view) :]


def round_trips(visit: list[Recorded], workdir: Path, env: dict[str, str]) -> Timed:
    """Return the wall and CPU time of a new process sending the visit's queries to the
    playback simulator on a pty with bare pyserial, one round trip at a time (see
    ``ROUND_TRIPS``)."""
    played = workdir / "round_trips.pickle"
    if not played.exists():
        profile = load_profile(PROFILE)
        sessions = [_exchanges(profile, recorded) for recorded in visit]
        played.write_bytes(pickle.dumps(sessions, protocol=pickle.HIGHEST_PROTOCOL))
    command = [sys.executable, "-c", ROUND_TRIPS, str(played), PROFILE]
    cpu_before = _children_cpu_s()
    started = time.perf_counter()
    done = subprocess.run(command, capture_output=True, timeout=GIVE_UP_S, check=False, env=env)
    elapsed = time.perf_counter() - started
    if done.returncode != 0:
        raise RuntimeError(
            f"the round trips failed (exit {done.returncode}): {done.stderr.decode()[-400:]}"
        )
    return Timed(elapsed, _children_cpu_s() - cpu_before)


def _exchanges(
    profile: Any, recorded: Recorded
) -> tuple[list[tuple[float, str, str]], list[tuple[bytes, bytes]]]:
    """Return one session's playback entries (a line received before the session's first
    query, the answer to a query sent outside it, is left out) and its exchanges: each query
    sent with the bytes of the answer recorded after it."""
    pairs = list(zip(recorded.directions, recorded.lines, strict=True))
    while pairs and pairs[0][0] != TX:
        pairs.pop(0)
    entries = [
        (0.0, direction, line_text(profile, RecordedLine(index, 0.0, direction, raw)))
        for index, (direction, raw) in enumerate(pairs)
    ]
    exchanges: list[tuple[bytes, bytes]] = []
    for direction, raw in pairs:
        if direction == TX:
            exchanges.append((raw, b""))
        else:
            query, answer = exchanges[-1]
            exchanges[-1] = (query, answer + raw)
    return entries, exchanges


# ----------------------------------------------------------------------------- the replay
def replay_visit(db: Path, visit_id: int, visit: list[Recorded], env: dict[str, str]) -> Timed:
    """Return the wall and CPU time of `chargebook replay --visit ID --speed 0`, a new process;
    raise RuntimeError unless it says every session of the visit was reproduced."""
    command = chargebook_args(
        "replay", "--visit", str(visit_id), "--db", str(db), "--speed", "0", "--json"
    )
    cpu_before = _children_cpu_s()
    started = time.perf_counter()
    done = subprocess.run(
        command, capture_output=True, text=True, timeout=GIVE_UP_S, check=False, env=env
    )
    elapsed = time.perf_counter() - started
    said = json.loads(done.stdout) if done.returncode == 0 and done.stdout else {}
    lines = [s.get("traffic_lines") for s in said.get("sessions", [])]
    if not said.get("reproduced") or lines != [len(r.lines) for r in visit]:
        raise RuntimeError(
            f"the replay of visit {visit_id} did not say reproduced for every session "
            f"(exit {done.returncode}): {done.stdout[-400:]} {done.stderr[-400:]}"
        )
    return Timed(elapsed, _children_cpu_s() - cpu_before)


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    beams, visit_s = (SMOKE_BEAMS, SMOKE_VISIT_S) if args.smoke else (FULL_BEAMS, FULL_VISIT_S)
    rounds = SMOKE_ROUNDS if args.smoke else FULL_ROUNDS
    with scratch("replay") as workdir:
        db = workdir / "station.sqlite"
        started = time.perf_counter()
        visit = record_visit(db, beams, visit_s)
        recording_s = time.perf_counter() - started
        (visit_id,) = read_db(db, "SELECT id FROM visits")[0]
        lines = [line for r in visit for line in r.lines]
        out = report.Report(
            f"replay: a visit of {beams} beam(s) over {visit_s / 3600:g} h of the daemon's clock, "
            f"{len(lines)} traffic lines ({PROFILE}), {rounds} round(s)",
            args.smoke,
        )
        out.note(
            f"recorded in {recording_s:.1f} s: visit {visit_id}, sessions "
            + ", ".join(f"{r.session_id} ({len(r.lines)} lines)" for r in visit)
        )
        env = children_env(workdir)
        replay_visit(db, visit_id, visit, env)  # untimed, each once: bytecode
        pty_alone(lines, env)
        round_trips(visit, workdir, env)
        alone, by_session, floor, replayed = [], [], [], []
        for _ in range(rounds):
            alone.append(pty_alone(lines, env))
            by_session.append(sum(pty_alone(list(r.lines), env).wall_s for r in visit))
            floor.append(round_trips(visit, workdir, env))
            replayed.append(replay_visit(db, visit_id, visit, env))
    queries = sum(direction == TX for r in visit for direction in r.directions)
    for number, (base, apart_s, trips, measured) in enumerate(
        zip(alone, by_session, floor, replayed, strict=True), 1
    ):
        out.note(
            f"round {number}: pty alone {base.wall_s:.2f} s (CPU {base.cpu_s:.2f} s), replay "
            f"{measured.wall_s:.2f} s (CPU {measured.cpu_s:.2f} s), ratio "
            f"{measured.wall_s / base.wall_s:.2f} (CPU {measured.cpu_s / base.cpu_s:.2f}); "
            f"a reader per session {apart_s:.2f} s (ratio {measured.wall_s / apart_s:.2f}); "
            f"{queries} round trips {trips.wall_s:.2f} s (CPU {trips.cpu_s:.2f} s, ratio "
            f"{measured.wall_s / trips.wall_s:.2f}, CPU {measured.cpu_s / trips.cpu_s:.2f}); "
            "every session reproduced"
        )
    out.note(f"load average at the end: {', '.join(f'{x:.1f}' for x in os.getloadavg())}")
    ratio = report.median([m.wall_s / b.wall_s for m, b in zip(replayed, alone, strict=True)])
    out.baseline(
        "the visit's lines through a pty, read by one new process with pyserial (median)",
        report.median([b.wall_s for b in alone]),
        "s",
    )
    out.measured(
        "chargebook replay --visit ID --speed 0, every session reproduced (median)",
        report.median([m.wall_s for m in replayed]),
        "s",
    )
    out.ratio(ratio, "median of the rounds' replay / pty alone")
    out.baseline(
        f"the floor: the visit's {queries} queries as bare pyserial query/answer round trips "
        "to the playback simulator on a pty, one new process (median)",
        report.median([t.wall_s for t in floor]),
        "s",
    )
    out.ratio(
        report.median([m.wall_s / t.wall_s for m, t in zip(replayed, floor, strict=True)]),
        "median of the rounds' replay / round trips (the floor of a replay that must query)",
    )
    met = ratio <= TARGET_RATIO
    out.target(
        f"replay <= {TARGET_RATIO:g} x the pty alone", met, f"{ratio / TARGET_RATIO:.1f} times it"
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
