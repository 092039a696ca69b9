"""Fault run: 100,000 fuzzed lines from the electrometer, into the real daemon.

    python -m tests.faults.fuzz_lines [--smoke]

The instrument here is the simulated electrometer's own parts, run in this process: its
push-exponent dialect (``DialectResponder``) on a real pseudo-terminal (``PtyServer``), answering
the daemon's commands as usual, but whose flood pushes fuzzed reading lines (seeded). The real
daemon (``chargebook serve``) reads them with a reading armed.

Every fuzzed line is wrong by construction, in one of these ways: random bytes (not starting
like a reading, a confirmation or a refusal), a reading cut short, a number that is NaN,
infinite, overflowing or misspelt, an unknown status word or unit, a non-ASCII byte or a
control character inside, a line longer than the profile's 128 bytes, stray spaces, a wrong
line kind, or two readings run together. Then 100 good lines follow.

Counted: crashes (the daemon exited, stopped collecting, or logged a traceback), rejected
lines logged by the daemon ("rejected a line from the electrometer"), raw lines recorded in
the station database; and that the good lines after the fuzz are taken without complaint.
Targets (issue 7): 0 crashes, every rejected line logged.
"""

from __future__ import annotations

import asyncio
import random
import sys

from chargebook.drivers_generic.profile import load_profile
from chargebook.drivers_generic.simulator.device import SimulatedElectrometer
from chargebook.drivers_generic.simulator.dialect import DialectResponder
from chargebook.drivers_generic.simulator.physics import ChamberParameters, ChamberPhysics
from chargebook.drivers_generic.simulator.serial_server import PtyServer

from tests.bench import report
from tests.bench.harness import (
    Station,
    collecting_daemon,
    last_traffic_id,
    read_db,
    scratch,
)

FULL_LINES, SMOKE_LINES = 100_000, 2_000
GOOD_LINES = 100
SEED = 3
PROFILE = "push-exponent"
REJECTED = "rejected a line from the electrometer"
FLOOD_WAIT_S = 600.0
LINE_LIMIT = 128  # push-exponent.toml, max_line_bytes

GOOD = b"S t=12.345 q=+2.012345E-08 C OK"
#: First bytes a line may not start with: a reading (S, E), an ack (A) or a refusal (N).
MEANINGFUL_STARTS = b"SEAN"
BAD_NUMBERS = (
    b"nan", b"+nan", b"inf", b"-inf", b"+9.9E+999", b"+1.0E+1000", b"+1,5E-08", b"+.E-08",
    b"++1.0E-08", b"+1.0e-08", b"+0x1p-3", b"", b"+1.0E", b"+\xd9\xa1.0E-08",
)  # fmt: skip
BAD_STATUS = (b"WHAT", b"ok", b"OK!", b"OVERRANGE", b"", b"O K")
BAD_UNITS = (b"nC", b"pC", b"c", b"", b"CC")


def _random_bytes(rng: random.Random) -> bytes:
    data = bytearray(rng.choice(range(256)) for _ in range(rng.randrange(0, 200)))
    data = data.replace(b"\n", b"#")
    if data and data[0] in MEANINGFUL_STARTS:
        data[0] = ord("#")
    return bytes(data)


def _cut_short(rng: random.Random) -> bytes:
    return GOOD[: rng.randrange(0, len(GOOD))]


def _bad_number(rng: random.Random) -> bytes:
    return GOOD.replace(b"+2.012345E-08", rng.choice(BAD_NUMBERS))


def _bad_status(rng: random.Random) -> bytes:
    return GOOD[: -len(b"OK")] + rng.choice(BAD_STATUS)


def _bad_unit(rng: random.Random) -> bytes:
    return GOOD.replace(b" C ", b" " + rng.choice(BAD_UNITS) + b" ")


def _inserted(rng: random.Random, choices: bytes) -> bytes:
    at = rng.randrange(0, len(GOOD) - 1)  # never last: a trailing CR would be read as framing
    return GOOD[:at] + bytes([rng.choice(choices)]) + GOOD[at:]


def _non_ascii(rng: random.Random) -> bytes:
    return _inserted(rng, bytes(range(0x80, 0x100)))


def _control(rng: random.Random) -> bytes:
    return _inserted(rng, bytes(b for b in range(0x20) if b != ord("\n")))


def _too_long(rng: random.Random) -> bytes:
    return GOOD + b" " + b"x" * rng.randrange(LINE_LIMIT - len(GOOD), 600)


def _stray_space(rng: random.Random) -> bytes:
    return rng.choice((b" " + GOOD, GOOD + b" ", GOOD + b"\t", GOOD.replace(b" ", b"  ", 1)))


def _wrong_kind(rng: random.Random) -> bytes:
    return rng.choice(b"XsQ1 ").to_bytes(1, "big") + GOOD[1:]


def _run_together(rng: random.Random) -> bytes:
    return GOOD + rng.choice((b"", b" ", b"\r")) + GOOD


FUZZERS = (
    _random_bytes, _cut_short, _bad_number, _bad_status, _bad_unit, _non_ascii, _control,
    _too_long, _stray_space, _wrong_kind, _run_together,
)  # fmt: skip


def fuzzed_line(rng: random.Random) -> bytes:
    """Return one line (without terminator) that the push-exponent profile must reject."""
    return rng.choice(FUZZERS)(rng)


class FuzzingResponder(DialectResponder):
    """The simulated push-exponent instrument whose flood pushes fuzzed lines (when ``fuzzing``)."""

    def __init__(self, seed: int) -> None:
        profile = load_profile(PROFILE)
        device = SimulatedElectrometer(ChamberPhysics(ChamberParameters(), seed))
        super().__init__(profile, device)
        self.rng = random.Random(seed)
        self.fuzzing = True

    def flood_line(self, index: int) -> str:
        """Return a fuzzed line (bytes kept as they are through surrogateescape)."""
        if not self.fuzzing:
            return super().flood_line(index)
        return fuzzed_line(self.rng).decode("ascii", errors="surrogateescape")

    def tick(self) -> list[str]:
        """Push nothing unasked but the flood (no streaming lines to blur the count)."""
        return []


async def fuzz(world: Station, pty: PtyServer, responder: FuzzingResponder, lines: int) -> dict:
    """Flood the daemon with fuzzed lines, then good ones; return the counts."""
    client = await collecting_daemon(world)
    try:
        await asyncio.sleep(0.3)
        first_id = last_traffic_id(world.db)
        logged_before = world.daemon_logs().count(REJECTED)
        written = await _flood(world, pty, lines, first_id)
        fuzz_rows = _rx_since(world, first_id)
        logged = world.daemon_logs().count(REJECTED) - logged_before
        responder.fuzzing = False
        good_from = last_traffic_id(world.db)
        await _flood(world, pty, GOOD_LINES, good_from)
        good_rows = _rx_since(world, good_from)
        status = await client.status()
        good_logged = world.daemon_logs().count(REJECTED) - logged_before - logged
    finally:
        await client.close()
    crashes = (not world.daemon_alive()) + world.daemon_logs().count("Traceback")
    crashes += status["state"] != "collecting"
    return {
        "lines": lines,
        "written": written,
        "recorded": fuzz_rows,
        "logged": logged,
        "good_recorded": good_rows,
        "good_rejected": good_logged,
        "crashes": crashes,
    }


async def _flood(world: Station, pty: PtyServer, lines: int, first_id: int) -> int:
    """Push ``lines`` flood lines as fast as the daemon takes them; wait until all recorded."""
    pty.flood(0, lines)
    written = await asyncio.to_thread(pty.wait_flood, FLOOD_WAIT_S)
    for _ in range(int(FLOOD_WAIT_S / 0.05)):
        if _rx_since(world, first_id) >= lines:
            break
        await asyncio.sleep(0.05)
    await asyncio.sleep(0.5)  # the daemon logs a rejected line after recording it
    return written


def _rx_since(world: Station, first_id: int) -> int:
    sql = "SELECT count(*) FROM traffic WHERE id > ? AND direction = 'rx'"
    return int(read_db(world.db, sql, (first_id,))[0][0])


def run(lines: int) -> dict:
    """Run the fuzz against a real daemon in a scratch directory; return the counts."""
    with scratch("fuzz") as workdir:
        responder = FuzzingResponder(SEED)
        pty = PtyServer(responder, responder.profile.framing, workdir / "electrometer")
        pty.start()
        world = Station(workdir, PROFILE, str(pty.link_path))
        try:
            return asyncio.run(fuzz(world, pty, responder, lines))
        finally:
            world.stop_daemon()
            pty.stop()


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    lines = SMOKE_LINES if args.smoke else FULL_LINES
    out = report.Report(f"fuzz: {lines} fuzzed lines from the electrometer", args.smoke)
    counts = run(lines)
    out.note(f"raw lines recorded in the database: {counts['recorded']} of {counts['written']}")
    out.note(
        f"good lines afterwards: {counts['good_recorded']} recorded, "
        f"{counts['good_rejected']} rejected"
    )
    out.baseline("fuzzed lines pushed", counts["written"], "lines")
    out.measured("rejected lines the daemon logged", counts["logged"], "lines")
    out.ratio(counts["logged"] / max(counts["written"], 1), "logged / pushed")
    out.target("0 crashes", counts["crashes"] == 0, f"{counts['crashes']} crash(es)")
    out.target(
        "every rejected line logged (and recorded)",
        counts["logged"] == counts["recorded"] == counts["written"] == lines,
        f"{counts['logged']} logged, {counts['recorded']} recorded of {lines}",
    )
    out.target(
        "good lines taken after the fuzz",
        counts["good_recorded"] == GOOD_LINES and counts["good_rejected"] == 0,
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
