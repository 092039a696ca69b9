"""Fault run: the electrometer's cable pulled and plugged back in, again and again, mid-session.

    python -m tests.faults.drop [--smoke]

The automatic operator takes sessions through (quick plan, simulated electrometer on a pty,
bench attached). Once a reading has been recorded since the last drop, at a seeded moment
while the next one is being collected, the bench pulls the cable
(``SimulatorControl.drop``: the pty closes, and comes back at the same path after a seeded
0.3–1.5 s); the run waits until the daemon says the electrometer is gone, then back. The
operator carries on (it continues the interrupted set once the instrument answers again).

Counted: crashes (the daemon or the simulator exited, or the daemon logged a traceback), and
drops recorded (``instrument_lost`` events in the station database, and ``instrument_back``).
Targets (issue 7), 10 drops: 0 crashes, every drop recorded.
"""

from __future__ import annotations

import asyncio
import random
import sys

from tests.bench import report
from tests.bench.harness import Station
from tests.faults.sessions import (
    Witness,
    event_count,
    operate,
    quick_station,
    readings_on_disk,
    stop,
    until,
    watched_client,
)

FULL_DROPS, SMOKE_DROPS = 10, 2
SEED = 11
AWAY_S = (0.3, 1.5)
#: How far into the collecting of a reading the cable is pulled, at most, s.
MID_READING_S = 0.2


async def drop_rounds(world: Station, drops: int, rng: random.Random) -> dict[str, int]:
    """Pull the cable ``drops`` times while readings are collected; return the counts."""
    witness = Witness()
    client = await watched_client(world, witness)
    operator = asyncio.create_task(operate(client, world))
    noticed = 0
    try:
        for _ in range(drops):
            recorded = len(witness.announced)
            await until(
                lambda n=recorded: len(witness.announced) > n, "a reading since the last drop"
            )
            await until(lambda: witness.state == "collecting" and witness.connected, "a reading")
            await asyncio.sleep(rng.uniform(0.0, MID_READING_S))
            with world.bench() as bench:
                bench.drop(rng.uniform(*AWAY_S))
            await until(lambda: not witness.connected, "the daemon to notice the drop")
            noticed += 1
            await until(lambda: witness.connected, "the electrometer to come back")
            if not world.daemon_alive():
                break
    finally:
        await stop(operator)
        await client.close()
    return {
        "drops": drops,
        "noticed": noticed,
        "lost_events": event_count(world, "instrument_lost"),
        "back_events": event_count(world, "instrument_back"),
        "crashes": _crashes(world),
        "readings": len(readings_on_disk(world)),
    }


def _crashes(world: Station) -> int:
    """Return how many of the station's processes died or logged a traceback."""
    dead = (not world.daemon_alive()) + (world.simulator.process.poll() is not None)
    return dead + world.daemon_logs().count("Traceback")


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    drops = SMOKE_DROPS if args.smoke else FULL_DROPS
    out = report.Report(f"drop: the electrometer's cable pulled {drops} times", args.smoke)
    with quick_station("drop") as world:
        counts = asyncio.run(drop_rounds(world, drops, random.Random(SEED)))
    out.note(f"readings recorded meanwhile: {counts['readings']}")
    out.note(f"restorations recorded as instrument_back: {counts['back_events']}")
    out.baseline("cable pulls", counts["drops"], "drops")
    out.measured("drops recorded as instrument_lost", counts["lost_events"], "drops")
    out.ratio(counts["lost_events"] / counts["drops"], "recorded / pulled")
    out.target("0 crashes", counts["crashes"] == 0, f"{counts['crashes']} crash(es)")
    out.target(
        "every drop recorded",
        counts["lost_events"] == counts["drops"] == counts["noticed"],
        f"{counts['lost_events']} recorded, {counts['noticed']} noticed of {counts['drops']}",
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
