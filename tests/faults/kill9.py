"""Fault run: the daemon killed with SIGKILL at random moments of a session, and restarted.

    python -m tests.faults.kill9 [--smoke]

The automatic operator takes sessions through (quick plan, simulated electrometer, bench
attached). At a random moment (seeded, 0.3–3 s into each round, always while a session is
open) the daemon gets SIGKILL, as a crash or a power cut would do to it; it is then started
again on the same database and socket, and the operator carries on where it left off.

Then the daemon is killed inside operator actions: redo, accept, abort and an environment
entry in turn (four rounds of each, one in the smoke run), each sent at a seeded moment of a
running session and followed a seeded 0–4 ms later by the SIGKILL (``tests.faults.actions``).

Counted at every kill:
* readings lost: those a subscribed client had been told of, or that were on disk just before
  the kill, and are not in the database after it;
* sessions resumed: the restarted daemon reports the session that was open as resumed (a
  session an abort closed before the kill is not open, so not counted);
* actions killed in flight: whole (all of the action's rows), absent (none) or partial (some:
  its status change, its event and its row in the input log not all there);
* at the end, over the whole file: for each of those action kinds, the status rows, the events
  that record them and the logged inputs must be as many (every action the automatic operator
  took, too).

At the end the last session is taken to its end. Targets (issues 7 and 11), 20 + 16 kills:
0 readings lost, every open session resumes, 0 actions partial, 0 disagreements in the record.
"""

from __future__ import annotations

import asyncio
import collections
import random
import sys
import time

from tests.bench import report
from tests.bench.harness import read_db
from tests.faults.actions import ACTIONS, kill_inside, record_disagreements
from tests.faults.sessions import (
    Witness,
    operate,
    quick_station,
    readings_on_disk,
    stop,
    watched_client,
)

FULL_KILLS, SMOKE_KILLS = 20, 2
#: Rounds of each action killed in flight (redo, accept, abort, environment entry).
FULL_ACTION_ROUNDS, SMOKE_ACTION_ROUNDS = 4, 1
SEED = 7
MOMENT_S = (0.3, 3.0)
OPEN_SESSION_WAIT_S = 60.0
FINISH_WAIT_S = 120.0


def session_open(world, session_id: int | None) -> bool:
    """Return True when the session is open in the station database (after a kill)."""
    if session_id is None:
        return False
    rows = read_db(world.db, "SELECT status FROM sessions WHERE id = ?", (session_id,))
    return bool(rows) and rows[0][0] == "open"


async def kill_rounds(world, kills: int, action_rounds: int, rng: random.Random) -> dict[str, int]:
    """Kill and restart the daemon ``kills`` times at random moments, then inside each action
    ``action_rounds`` times; return the counts."""
    counts: dict = {"kills": 0, "open": 0, "resumed": 0, "lost": 0, "announced": 0}
    counts["states"] = collections.Counter()
    counts["actions"] = collections.Counter()
    rounds = [None] * kills + [action for _ in range(action_rounds) for action in ACTIONS]
    for action in rounds:
        witness = Witness()
        client = await watched_client(world, witness)
        task = asyncio.create_task(operate(client, world))
        await asyncio.sleep(rng.uniform(*MOMENT_S))
        deadline = time.monotonic() + OPEN_SESSION_WAIT_S
        while witness.open_session is None and time.monotonic() < deadline:
            await asyncio.sleep(0.05)
        if action is not None:
            await stop(task)  # the operator's hands off: the run sends the action itself
        session = witness.open_session
        before = readings_on_disk(world)
        announced = set(witness.announced)
        if action is None:
            counts["states"][witness.state] += 1
            world.kill_daemon()
        else:
            killed = await kill_inside(world, client, witness, action, rng)
            counts["actions"][(killed.action, killed.outcome)] += 1
        await stop(task)
        await client.close()
        after = readings_on_disk(world)
        counts["kills"] += 1
        counts["announced"] += len(announced)
        counts["lost"] += len((announced | before) - after)
        still_open = session_open(world, session)
        world.restart_daemon()
        counts["open"] += still_open
        counts["resumed"] += still_open and world.daemon.info["resumed_session"] == session
    client = await watched_client(world, Witness())
    try:
        counts["finished"] = await asyncio.wait_for(operate(client, world, 1), FINISH_WAIT_S)
    finally:
        await client.close()
    counts["disagreements"] = record_disagreements(world)
    return counts


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    kills = SMOKE_KILLS if args.smoke else FULL_KILLS
    action_rounds = SMOKE_ACTION_ROUNDS if args.smoke else FULL_ACTION_ROUNDS
    in_actions = action_rounds * len(ACTIONS)
    out = report.Report(
        f"kill -9: the daemon killed at {kills} random moments and inside {in_actions} actions",
        args.smoke,
    )
    with quick_station("kill9") as world:
        counts = asyncio.run(kill_rounds(world, kills, action_rounds, random.Random(SEED)))
    out.note(f"readings a client had been told of, summed over the kills: {counts['announced']}")
    states = ", ".join(f"{state} {n}" for state, n in counts["states"].most_common())
    out.note(f"what the daemon was doing when killed at random: {states}")
    actions = ", ".join(
        f"{action} {outcome} {n}" for (action, outcome), n in sorted(counts["actions"].items())
    )
    out.note(f"actions killed in flight (action, what it left, how many): {actions}")
    partial = sum(n for (_, outcome), n in counts["actions"].items() if outcome == "partial")
    out.baseline("sessions open after the kills", counts["open"], "sessions")
    out.measured("sessions the restarted daemon resumed", counts["resumed"], "sessions")
    out.ratio(counts["resumed"] / max(counts["open"], 1), "resumed / open")
    out.target("0 readings lost", counts["lost"] == 0, f"{counts['lost']} lost")
    out.target(
        "every open session resumes",
        counts["resumed"] == counts["open"],
        f"{counts['resumed']} of {counts['open']}",
    )
    out.target("0 actions partial", partial == 0, f"{partial} of {in_actions}")
    disagreements = counts["disagreements"]
    out.target(
        "0 disagreements between status rows, events and logged inputs in the record",
        not disagreements,
        "; ".join(disagreements) or "none",
    )
    out.target("the last resumed session runs to its end", counts["finished"] == 1)
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
