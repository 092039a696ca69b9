"""Fault run: 10,000 malformed JSON-RPC messages on the daemon's socket, while a session runs.

    python -m tests.faults.bad_rpc [--smoke]

One client (the automatic operator, through the real ``DaemonClient``) takes sessions through
on the simulated electrometer. Another connection sends malformed messages (seeded): random
bytes, JSON cut short, JSON that is not an object, batches, nesting thousands deep, requests
without "jsonrpc" or with the wrong version, methods that are not strings or do not exist, ids
that cannot be ids (true, 1.5, NaN, objects), parameters of the wrong kind, unknown or missing,
numbers written NaN or Infinity, notifications of unknown methods, blank lines, and lines over
the 64 KiB limit (after which the daemon closes that connection, and the sender reconnects).

Each message is followed by a marker request (itself refused) so that its replies can be told
apart. Counted: replies that were results (a malformed message carried out: must be none),
messages that got no error although they asked for an answer, connections dropped without an
error reply, and whether the daemon and the operator's client came through. The operator's
``status`` round trip is timed before and during, for the ratio.
Targets (issue 7): the daemon still up, the second client unaffected.
"""

from __future__ import annotations

import asyncio
import json
import random
import sys
import time
from dataclasses import dataclass, field

from chargebook.acquire import protocol

from tests.bench import report
from tests.bench.harness import Station
from tests.faults.sessions import Witness, operate, quick_station, stop, watched_client

FULL_MESSAGES, SMOKE_MESSAGES = 10_000, 300
SEED = 5
PROBES = 30
REPLY_WAIT_S = 10.0
VALID = {"jsonrpc": "2.0", "id": 1, "method": "environment.set"}
KNOWN_WITH_PARAMS = ("environment.set", "session.start", "set.redo", "session.abort", "hello")
WRONG_VALUES = ("warm", None, [], {}, True, "", "1e3", [1, 2])


def _dump(value: object) -> bytes:
    return json.dumps(value, allow_nan=True).encode()


def _request(**fields: object) -> dict:
    return {"jsonrpc": "2.0", "id": 7, "method": "status", **fields}


@dataclass(frozen=True)
class Malformed:
    """One malformed message: its bytes (without the newline) and what the daemon must do."""

    line: bytes
    answer: str  # "error": one error reply; "none": no reply; "close": an error, then it closes


def _random_bytes(rng: random.Random) -> Malformed:
    data = bytes(rng.randrange(256) for _ in range(rng.randrange(1, 300))).replace(b"\n", b" ")
    return Malformed(data, "error" if data.strip() else "none")


def _cut_short(rng: random.Random) -> Malformed:
    whole = _dump(_request(params={"temperature_C": 21.5}))
    return Malformed(whole[: rng.randrange(1, len(whole) - 1)], "error")


def _not_an_object(rng: random.Random) -> Malformed:
    choices = (b"1", b'"status"', b"null", b"true", b"[]", b"[{}]", _dump([_request()]), b"3.5")
    return Malformed(rng.choice(choices), "error")


def _deep(rng: random.Random) -> Malformed:
    depth = rng.randrange(1_000, 12_000)  # under the 64 KiB line limit
    return Malformed(rng.choice((b"[", b'{"a":')) * depth, "error")


def _bad_envelope(rng: random.Random) -> Malformed:
    request = _request()
    change = rng.randrange(6)
    if change == 0:
        del request["jsonrpc"]
    elif change == 1:
        request["jsonrpc"] = rng.choice(("1.0", 2.0, None, "2"))
    elif change == 2:
        del request["method"]
    elif change == 3:
        request["method"] = rng.choice((123, None, ["status"], {"name": "status"}, True))
    elif change == 4:
        request["id"] = rng.choice((True, False, 1.5, {"a": 1}, [1], float("nan"), float("inf")))
    else:
        request["method"] = rng.choice(("launch.rocket", "", "STATUS", "status ", "\ud800"))
    return Malformed(_dump(request), "error")


def _bad_params(rng: random.Random) -> Malformed:
    method = rng.choice(KNOWN_WITH_PARAMS)
    spec = protocol.METHODS[method]
    params: object
    change = rng.randrange(4)
    if change == 0:
        params = rng.choice(([], "x", 3, True))
    elif change == 1:
        params = {"no_such_parameter": 1}
    else:
        required = [p.name for p in spec.params if p.required] or [p.name for p in spec.params]
        params = {name: rng.choice(WRONG_VALUES) for name in required}
        if change == 3:
            params[rng.choice(required)] = float("nan")
        params = {k: v for k, v in params.items() if not _fits(spec, k, v)} or {"x": 1}
    return Malformed(
        _dump({"jsonrpc": "2.0", "id": 9, "method": method, "params": params}), "error"
    )


def _fits(spec: protocol.MethodSpec, name: str, value: object) -> bool:
    """Return True if ``value`` would pass as ``name`` (such a parameter is left out)."""
    try:
        protocol.validate_params(spec.name, {name: value})
    except protocol.ParamsError as error:
        return error.field != name
    return True


def _unknown_notification(rng: random.Random) -> Malformed:
    method = rng.choice(("launch.rocket", "status.please", "x"))
    return Malformed(_dump({"jsonrpc": "2.0", "method": method}), "none")


def _blank(rng: random.Random) -> Malformed:
    return Malformed(rng.choice((b"", b" ", b"\t", b"\r")), "none")


def _too_long(rng: random.Random) -> Malformed:
    padding = "a" * (protocol.MAX_MESSAGE_BYTES + rng.randrange(1, 5000))
    return Malformed(_dump(_request(x=padding)), "close")


#: (weight, maker): over-long lines are rare, as each costs a new connection.
MAKERS = (
    (20, _random_bytes), (10, _cut_short), (10, _not_an_object), (2, _deep),
    (20, _bad_envelope), (25, _bad_params), (5, _unknown_notification), (5, _blank),
    (1, _too_long),
)  # fmt: skip


def malformed(rng: random.Random) -> Malformed:
    """Return one malformed message."""
    weights, makers = zip(*MAKERS, strict=True)
    return rng.choices(makers, weights)[0](rng)


@dataclass
class Tally:
    """What came back on the malformed messages' connection."""

    sent: int = 0
    errors: int = 0
    results: int = 0
    unanswered: int = 0
    dropped: int = 0
    closed_as_told: int = 0
    codes: dict[int, int] = field(default_factory=dict)


class Abuser:
    """The connection that sends malformed messages, one at a time, each followed by a marker."""

    def __init__(self, socket: str) -> None:
        self.socket = socket
        self.reader: asyncio.StreamReader | None = None
        self.writer: asyncio.StreamWriter | None = None
        self.markers = 0
        self._lost = False

    async def open(self) -> None:
        self.reader, self.writer = await asyncio.open_unix_connection(self.socket, limit=1 << 20)

    async def close(self) -> None:
        if self.writer is not None:
            self.writer.close()

    async def send(self, message: Malformed, tally: Tally) -> None:
        """Send one message (and a marker after it); count what came back."""
        assert self.writer is not None and self.reader is not None
        self.markers += 1
        marker = f"marker-{self.markers}"
        tail = b"" if message.answer == "close" else _dump(_request(id=marker, method="no.such"))
        self.writer.write(message.line + b"\n" + tail + b"\n")
        tally.sent += 1
        replies = await self._replies_until(marker)
        errors = [r for r in replies if "error" in r]
        tally.results += sum("result" in r for r in replies)
        tally.errors += len(errors)
        for reply in errors:
            code = reply["error"].get("code")
            tally.codes[code] = tally.codes.get(code, 0) + 1
        if message.answer == "close":
            tally.closed_as_told += bool(errors) and self.reader.at_eof()
            await self.close()
            await self.open()
        elif self._lost:
            tally.dropped += 1
            await self.open()
        elif message.answer == "error" and not errors:
            tally.unanswered += 1

    async def _replies_until(self, marker: str) -> list[dict]:
        """Return the replies before the marker's (or before the connection ended)."""
        assert self.reader is not None
        self._lost = False
        replies: list[dict] = []
        while True:
            try:
                line = await asyncio.wait_for(self.reader.readline(), REPLY_WAIT_S)
            except TimeoutError:
                self._lost = True
                return replies
            if not line:
                self._lost = True
                return replies
            reply = json.loads(line)
            if reply.get("id") == marker:
                return replies
            replies.append(reply)


async def probe_ms(client, count: int) -> list[float]:
    """Return ``count`` round-trip times of ``status`` on ``client``, in ms."""
    times = []
    for _ in range(count):
        started = time.perf_counter()
        await client.status()
        times.append((time.perf_counter() - started) * 1000)
        await asyncio.sleep(0.01)
    return times


async def abuse(world: Station, messages: int, rng: random.Random) -> dict:
    """Run the operator and the abuser side by side; return what was counted."""
    witness = Witness()
    good = await watched_client(world, witness)
    operator = asyncio.create_task(operate(good, world))
    before_ms = await probe_ms(good, PROBES)
    readings_before = len(witness.announced)
    abuser = Abuser(str(world.socket))
    await abuser.open()
    tally = Tally()
    during_ms: list[float] = []
    try:
        for number in range(messages):
            await abuser.send(malformed(rng), tally)
            if number % max(messages // PROBES, 1) == 0:
                during_ms += await probe_ms(good, 1)
        after = await good.status()
    finally:
        await abuser.close()
        operator_failed = operator.done() and operator.exception() is not None
        await stop(operator)
        good_connected = good.connected
        await good.close()
    return {
        "tally": tally,
        "before_ms": before_ms,
        "during_ms": during_ms,
        "readings_during": len(witness.announced) - readings_before,
        "daemon_up": world.daemon_alive() and after["state"] is not None,
        "good_ok": good_connected and not operator_failed,
        "tracebacks": world.daemon_logs().count("Traceback"),
    }


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    messages = SMOKE_MESSAGES if args.smoke else FULL_MESSAGES
    out = report.Report(f"bad rpc: {messages} malformed JSON-RPC messages", args.smoke)
    with quick_station("badrpc") as world:
        found = asyncio.run(abuse(world, messages, random.Random(SEED)))
    tally: Tally = found["tally"]
    codes = ", ".join(
        f"{protocol.ERROR_NAMES.get(code, code)} {n}" for code, n in sorted(tally.codes.items())
    )
    out.note(f"error replies: {tally.errors} ({codes})")
    out.note(
        f"malformed messages carried out: {tally.results}; asked for an answer and got no error: "
        f"{tally.unanswered}; connections dropped without a reply: {tally.dropped}; "
        f"over-long lines refused and closed: {tally.closed_as_told}; "
        f"daemon tracebacks: {found['tracebacks']}"
    )
    out.note(f"readings the operator's session took meanwhile: {found['readings_during']}")
    before, during = report.median(found["before_ms"]), report.median(found["during_ms"])
    out.baseline("operator's status round trip, before (median)", before, "ms")
    out.measured("operator's status round trip, during (median)", during, "ms")
    out.ratio(during / before, "during / before")
    out.target("the daemon still up", found["daemon_up"])
    out.target(
        "the second client unaffected (connected, its session going on)",
        found["good_ok"] and found["readings_during"] > 0,
    )
    out.target(
        "every malformed message refused, none carried out, no connection dropped unanswered",
        tally.results == 0 and tally.unanswered == 0 and tally.dropped == 0,
        f"{tally.results} carried out, {tally.unanswered} unanswered, {tally.dropped} dropped",
    )
    out.target("no traceback in the daemon's log", found["tracebacks"] == 0)
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
