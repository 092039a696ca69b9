"""Benchmark: the daemon's resident memory across a million simulated readings.

    python -m tests.bench.memory [--smoke]

The real daemon, collecting (a timed leakage integration), reads a flood of 1,000,000 reading
lines from the simulated electrometer (push-exponent dialect) as fast as it can: each line is
parsed, committed to the station database as raw traffic and handed to the engine, exactly as
in ``tests.bench.pipeline``.

* Baseline: the daemon's resident set size (RSS) after a warm-up flood of 100,000 lines
  (SQLite's page cache, the allocator's pools and the interpreter's caches are then full).
* Measured: its RSS after the million lines, and the largest RSS seen while they went through
  (sampled every 0.25 s).

Target (issue 7): growth of at most 5 MB.
"""

from __future__ import annotations

import asyncio
import sys

from tests.bench import report
from tests.bench.harness import QUIET_STREAM, Station, collecting_daemon, station
from tests.bench.pipeline import daemon_per_s

FULL_WARM_UP, FULL_COUNT = 100_000, 1_000_000
SMOKE_WARM_UP, SMOKE_COUNT = 5_000, 20_000
GROWTH_TARGET_MB = 5.0
SAMPLE_S = 0.25
MB = 1024 * 1024


async def rss_during_flood(world: Station, warm_up: int, count: int) -> dict[str, float]:
    """Return the daemon's RSS (bytes) after the warm-up, at the end and at its largest."""
    client = await collecting_daemon(world)
    try:
        await daemon_per_s(world, client, warm_up)
        await asyncio.sleep(1.0)
        before = world.daemon_rss_bytes()
        samples = [before]

        async def sample() -> None:
            while True:
                samples.append(world.daemon_rss_bytes())
                await asyncio.sleep(SAMPLE_S)

        sampler = asyncio.create_task(sample())
        try:
            rate = await daemon_per_s(world, client, count)
        finally:
            sampler.cancel()
        await asyncio.sleep(1.0)
        after = world.daemon_rss_bytes()
    finally:
        await client.close()
    return {"before": before, "after": after, "peak": max(*samples, after), "rate": rate}


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    warm_up, count = (SMOKE_WARM_UP, SMOKE_COUNT) if args.smoke else (FULL_WARM_UP, FULL_COUNT)
    out = report.Report(
        f"memory: daemon RSS across {count} reading lines (after {warm_up} to warm up)",
        args.smoke,
    )
    with station("memory", "push-exponent", *QUIET_STREAM) as world:
        figures = asyncio.run(rss_during_flood(world, warm_up, count))
    growth_MB = (figures["after"] - figures["before"]) / MB
    peak_growth_MB = (figures["peak"] - figures["before"]) / MB
    out.note(f"the lines went through at {figures['rate']:.0f} readings/s")
    out.note(f"largest RSS while they went through: {figures['peak'] / MB:.1f} MB")
    out.baseline("daemon RSS after the warm-up", figures["before"] / MB, "MB")
    out.measured(f"daemon RSS after {count} more readings", figures["after"] / MB, "MB")
    out.ratio(figures["after"] / figures["before"], "measured / baseline")
    out.target(
        f"growth <= {GROWTH_TARGET_MB:g} MB (it grew {growth_MB:+.2f} MB)",
        growth_MB <= GROWTH_TARGET_MB,
        f"{growth_MB - GROWTH_TARGET_MB:.2f} MB over",
    )
    out.target(
        f"largest growth while running <= {GROWTH_TARGET_MB:g} MB "
        f"(it grew {peak_growth_MB:+.2f} MB)",
        peak_growth_MB <= GROWTH_TARGET_MB,
        f"{peak_growth_MB - GROWTH_TARGET_MB:.2f} MB over",
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
