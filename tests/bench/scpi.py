"""Benchmark: one SCPI query through the driver, against the same query in raw pyvisa.

    python -m tests.bench.scpi [--smoke]

The simulated electrometer serves SCPI on a loopback TCP socket (``chargebook simulate --scpi
0``). Both sides use pyvisa with the pure-Python backend (``@py``) on the same resource:

* Baseline: ``resource.query("FETC?")`` (write, read to the line feed, decode).
* Measured: the driver's ``read_charge()`` with the ``scpi-generic`` profile, which sends the
  profile's ``FETC?``, frames, logs and parses the answer into a Sample in nC.

Blocks of queries alternate between the two, and the median time per query of each is compared.
Target (issue 17, target 4): the driver's query takes at most 1.2 times the raw query. The CPU
time per query of each (this process's) is noted too.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable

from tests.bench import report
from tests.bench.harness import scratch

FULL_QUERIES, FULL_BLOCKS = 200, 41
SMOKE_QUERIES, SMOKE_BLOCKS = 100, 1
TARGET_RATIO = 1.2
QUERY = "FETC?"


def per_query_s(query: Callable[[], object], count: int, cpu_s: list[float]) -> float:
    """Return the mean wall time of ``count`` calls of ``query``, in seconds; append their mean
    CPU time (this process's) to ``cpu_s``."""
    started, cpu_started = time.perf_counter(), time.process_time()
    for _ in range(count):
        query()
    cpu_s.append((time.process_time() - cpu_started) / count)
    return (time.perf_counter() - started) / count


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    queries = SMOKE_QUERIES if args.smoke else FULL_QUERIES
    blocks = SMOKE_BLOCKS if args.smoke else FULL_BLOCKS
    out = report.Report(
        f"scpi: {blocks} block(s) of {queries} '{QUERY}' queries each way, loopback TCP",
        args.smoke,
    )
    import pyvisa
    from chargebook.acquire.processes import start_child, stop_child
    from chargebook.drivers_generic import open_electrometer

    with scratch("scpi") as workdir:
        command = ["simulate", "--scpi", "0", "--profile", "scpi-generic"]
        simulator = start_child("simulated electrometer", command, workdir / "simulator.log")
        manager = pyvisa.ResourceManager("@py")
        resource = simulator.info["scpi"]
        raw = manager.open_resource(resource, read_termination="\n", write_termination="\n")
        driver = open_electrometer("scpi-generic", resource=resource)
        try:
            raw_s, driver_s, raw_cpu_s, driver_cpu_s = [], [], [], []
            for _ in range(blocks):
                raw_s.append(per_query_s(lambda: raw.query(QUERY), queries, raw_cpu_s))
                driver_s.append(per_query_s(driver.read_charge, queries, driver_cpu_s))
        finally:
            driver.close()
            raw.close()
            manager.close()
            stop_child(simulator.process)
    baseline, measured = report.median(raw_s), report.median(driver_s)
    ratios = [d / r for d, r in zip(driver_s, raw_s, strict=True)]
    out.note("blocks, raw / driver µs per query: " + ", ".join(
        f"{r * 1e6:.0f} / {d * 1e6:.0f}" for r, d in zip(raw_s, driver_s, strict=True)
    ))  # fmt: skip
    out.note(
        f"CPU µs per query (medians of blocks; the wall time's steadier part on a shared "
        f"machine): raw {report.median(raw_cpu_s) * 1e6:.1f}, "
        f"driver {report.median(driver_cpu_s) * 1e6:.1f}"
    )
    out.baseline("raw pyvisa query (median of blocks)", baseline * 1e6, "µs per query")
    out.measured("driver read_charge (median of blocks)", measured * 1e6, "µs per query")
    ratio = report.median(ratios)
    out.ratio(ratio, "median of the blocks' driver / raw")
    out.target(
        f"ratio <= {TARGET_RATIO}",
        ratio <= TARGET_RATIO,
        f"{ratio / TARGET_RATIO - 1:.0%} over",
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
