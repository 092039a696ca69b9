"""Fault run: the daemon killed with SIGKILL at random moments of a session, and restarted.

    python -m tests.faults.kill9 [--smoke]

The automatic operator takes sessions through (quick plan, simulated electrometer, bench
attached). At a random moment (seeded, 0.3–3 s into each round, always while a session is
open) the daemon gets SIGKILL, as a crash or a power cut would do to it; it is then started
again on the same database and socket, and the operator carries on where it left off.

Counted at every kill:
* readings lost: those a subscribed client had been told of, or that were on disk just before
  the kill, and are not in the database after it;
* sessions resumed: the restarted daemon reports the session that was open as resumed.

At the end the last session is taken to its end. Targets (issue 7), 20 kills: 0 readings lost,
20 of 20 sessions resume.
"""

from __future__ import annotations

import asyncio
import collections
import random
import sys
import time

from tests.bench import report
from tests.faults.sessions import (
    Witness,
    operate,
    quick_station,
    readings_on_disk,
    stop,
    watched_client,
)

FULL_KILLS, SMOKE_KILLS = 20, 2
SEED = 7
MOMENT_S = (0.3, 3.0)
OPEN_SESSION_WAIT_S = 60.0
FINISH_WAIT_S = 120.0


async def kill_rounds(world, kills: int, rng: random.Random) -> dict[str, int]:
    """Kill and restart the daemon ``kills`` times; return the counts."""
    counts: dict = {"kills": 0, "resumed": 0, "lost": 0, "announced": 0, "finished": 0}
    counts["states"] = collections.Counter()
    for _ in range(kills):
        witness = Witness()
        client = await watched_client(world, witness)
        task = asyncio.create_task(operate(client, world))
        await asyncio.sleep(rng.uniform(*MOMENT_S))
        deadline = time.monotonic() + OPEN_SESSION_WAIT_S
        while witness.open_session is None and time.monotonic() < deadline:
            await asyncio.sleep(0.05)
        session = witness.open_session
        before = readings_on_disk(world)
        announced = set(witness.announced)
        counts["states"][witness.state] += 1
        world.kill_daemon()
        await stop(task)
        await client.close()
        after = readings_on_disk(world)
        counts["kills"] += 1
        counts["announced"] += len(announced)
        counts["lost"] += len((announced | before) - after)
        world.restart_daemon()
        counts["resumed"] += session is not None and world.daemon.info["resumed_session"] == session
    client = await watched_client(world, Witness())
    try:
        counts["finished"] = await asyncio.wait_for(operate(client, world, 1), FINISH_WAIT_S)
    finally:
        await client.close()
    return counts


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    kills = SMOKE_KILLS if args.smoke else FULL_KILLS
    out = report.Report(f"kill -9: the daemon killed at {kills} random moments", args.smoke)
    with quick_station("kill9") as world:
        counts = asyncio.run(kill_rounds(world, kills, random.Random(SEED)))
    out.note(f"readings a client had been told of, summed over the kills: {counts['announced']}")
    states = ", ".join(f"{state} {n}" for state, n in counts["states"].most_common())
    out.note(f"what the daemon was doing when killed: {states}")
    out.baseline("sessions open when the daemon was killed", counts["kills"], "sessions")
    out.measured("sessions the restarted daemon resumed", counts["resumed"], "sessions")
    out.ratio(counts["resumed"] / counts["kills"], "resumed / killed")
    out.target("0 readings lost", counts["lost"] == 0, f"{counts['lost']} lost")
    out.target(
        f"{kills} of {kills} sessions resume",
        counts["resumed"] == kills,
        f"{counts['resumed']} of {kills}",
    )
    out.target("the last resumed session runs to its end", counts["finished"] == 1)
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
