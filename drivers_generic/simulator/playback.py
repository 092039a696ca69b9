"""Playback: the simulated instrument replays a recorded log of its traffic.

The log is JSON lines, one per line of traffic, as the driver saw it::

    {"t_s": 12.034, "dir": "tx", "line": "Q?"}
    {"t_s": 12.051, "dir": "rx", "line": "Q +20.1234 nC A"}

``tx`` is what the driver sent, ``rx`` what the instrument answered; ``line`` is the text without
its terminator (bytes that are not text are kept with Python's ``surrogateescape``). A ``tx``
entry is a gate: playback waits there until the driver sends a command (a different command than
the recorded one is logged as a warning and still answered, so a changed plan can be replayed).
In query mode the ``rx`` lines after a gate are the answer, sent at once. In push mode they are
sent with their recorded spacing divided by ``speed`` (``speed`` 0: as fast as possible).

:class:`TrafficRecorder` is a TrafficListener that writes such a log.
"""

from __future__ import annotations

import contextlib
import itertools
import json
import logging
import math
import tempfile
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from chargebook.drivers_generic.interface import TrafficDirection, TrafficListener
from chargebook.drivers_generic.serial_transport import SerialTransport

if TYPE_CHECKING:
    from chargebook.drivers_generic.profile import Framing, Profile

log = logging.getLogger("chargebook.simulator.playback")


#: The longest line a traffic log may have, in bytes (newline included): an entry holds one
#: recorded line, which a profile bounds to at most 64 KiB (``max_line_bytes``), six times that
#: at worst once escaped as JSON.
MAX_LOG_LINE_BYTES = 1 << 20


class PlaybackLogError(ValueError):
    """A playback log line is not a valid entry; the message names the line and the field."""


def parse_log(lines: list[str], source: str = "log") -> list[tuple[float, str, str]]:
    """Return the entries (t_s, dir, line) of a JSON-lines traffic log, strictly checked."""
    entries = []
    for number, text in enumerate(lines, start=1):
        if not text.strip():
            continue
        where = f"{source} line {number}"
        try:
            entry = json.loads(text)
        except json.JSONDecodeError as error:
            raise PlaybackLogError(f"{where}: not valid JSON ({error})") from None
        if not isinstance(entry, dict):
            raise PlaybackLogError(f"{where}: expected an object with t_s, dir, line")
        t_s, direction, line = entry.get("t_s"), entry.get("dir"), entry.get("line")
        if isinstance(t_s, bool) or not isinstance(t_s, int | float) or not math.isfinite(t_s):
            raise PlaybackLogError(f"{where}: t_s = {t_s!r} is not allowed; allowed: seconds")
        if direction not in ("rx", "tx"):
            raise PlaybackLogError(f"{where}: dir = {direction!r} is not allowed; allowed: rx, tx")
        if not isinstance(line, str):
            raise PlaybackLogError(f"{where}: line = {line!r} is not allowed; allowed: a string")
        entries.append((float(t_s), direction, line))
    return entries


def read_log(path: Path) -> list[tuple[float, str, str]]:
    """Return the entries of the traffic log at ``path`` (see :func:`parse_log`).

    The file is read a line at a time, each at most MAX_LOG_LINE_BYTES: a longer line is
    refused as soon as that many bytes are read, never held whole in memory.
    """
    lines = []
    with Path(path).open("rb") as log_file:
        for number in itertools.count(1):
            raw = log_file.readline(MAX_LOG_LINE_BYTES + 1)
            if not raw:
                break
            if len(raw) > MAX_LOG_LINE_BYTES and not raw.endswith(b"\n"):
                raise PlaybackLogError(
                    f"{path} line {number}: longer than {MAX_LOG_LINE_BYTES:,} bytes, so not a "
                    "traffic log entry (an entry holds one recorded instrument line)"
                )
            lines.append(raw.decode("utf-8", errors="surrogateescape").rstrip("\r\n"))
    return parse_log(lines, str(path))


class PlaybackResponder:
    """Answers a driver from a recorded traffic log (see the module docstring)."""

    def __init__(
        self,
        entries: list[tuple[float, str, str]],
        mode: str,
        speed: float = 1.0,
        *,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if isinstance(speed, bool) or not (isinstance(speed, int | float) and 0 <= speed < 1e9):
            raise PlaybackLogError(f"speed = {speed!r} is not allowed; allowed: 0 or more")
        self.entries = entries
        self.mode = mode
        self.speed = float(speed)
        self.clock = clock
        self.position = 0
        self._commands_waiting = 0
        self._anchor: tuple[float, float] | None = None  # (wall time, log time)
        self._lock = threading.Lock()
        self._finished_logged = False

    @property
    def finished(self) -> bool:
        """Return True once every entry has been played."""
        return self.position >= len(self.entries)

    def respond(self, line: str) -> list[str]:
        """Count the command; in query mode return the recorded answer at once."""
        with self._lock:
            self._commands_waiting += 1
            if self.mode == "query":
                return self._play(due_only=False)
            return []

    def tick(self) -> list[str]:
        """Return the recorded lines now due (push mode)."""
        with self._lock:
            if self.mode == "query":
                return []
            return self._play(due_only=True)

    #: How long a pushed line may wait for room on a full port (s): a recording's every line
    #: must reach the reader, at any speed.
    push_wait_s = 30.0

    def tick_interval_s(self) -> float:
        """Return how often the server should call :meth:`tick`, in seconds (query mode sends
        nothing unasked: the server only wakes for commands, and to see whether to stop)."""
        if self.mode == "query":
            return 0.1
        return 0.002 if self.speed == 0 else 0.01

    def flood_line(self, index: int) -> str:
        """Refuse: a flood has no place in a playback."""
        raise RuntimeError("flood is not available in playback mode")

    def _play(self, *, due_only: bool) -> list[str]:
        lines: list[str] = []
        while self.position < len(self.entries):
            t_s, direction, text = self.entries[self.position]
            if direction == "tx":
                if self._commands_waiting == 0:
                    break
                self._commands_waiting -= 1
                self._anchor = (self.clock(), t_s)
                self.position += 1
                continue
            if due_only and not self._due(t_s):
                break
            lines.append(text)
            self.position += 1
        if self.finished and not self._finished_logged:
            self._finished_logged = True
            log.info("playback finished: %d entries", len(self.entries))
        return lines

    def _due(self, t_s: float) -> bool:
        if self._anchor is None:
            self._anchor = (self.clock(), t_s)
        if self.speed == 0:
            return True
        wall_anchor, log_anchor = self._anchor
        return self.clock() >= wall_anchor + (t_s - log_anchor) / self.speed


#: The longest wait for a command just written to come through the pty, in seconds.
COMMAND_THROUGH_S = 2.0


@dataclass(frozen=True)
class PlaybackPort:
    """A playback served on a real pseudo-terminal (see :func:`playback_port`).

    ``answer`` is None when a thread serves the pty; else the function that answers the
    commands written to it (given how many lines were written), which the caller runs after
    each write (:meth:`transport`).
    """

    path: Path
    answer: Callable[[int], None] | None

    def transport(
        self, profile: Profile, traffic: TrafficListener, clock: Callable[[], float]
    ) -> SerialTransport:
        """Return an unopened serial transport on the port for ``profile``'s driver."""
        from chargebook.drivers_generic import build_transport

        if self.answer is None:
            return build_transport(profile, port=str(self.path), traffic=traffic, clock=clock)
        return AnsweredTransport(
            str(self.path),
            profile.port,
            profile.framing,
            write_timeout_s=profile.timing.timeout_s,
            traffic=traffic,
            clock=clock,
            answer=self.answer,
        )


@contextlib.contextmanager
def playback_port(
    entries: Sequence[tuple[float, str, str]], framing: Framing, mode: str, speed: float
) -> Iterator[PlaybackPort]:
    """Play ``entries`` (see :func:`parse_log`) on a real pseudo-terminal, in this process; the
    pty is closed on the way out.

    In query mode at speed 0, where every recorded answer follows its command at once, the
    commands are answered in the caller's own thread, each as soon as it is written (the
    transport of :meth:`PlaybackPort.transport`): the driver still writes each command to the
    pty and reads the answer's bytes from it, with no thread to wake and no wait between.
    Otherwise (pushed lines, or a recorded pace to keep) a thread serves the pty, as
    ``chargebook simulate --playback`` serves it from a process of its own.
    """
    from chargebook.drivers_generic.simulator.serial_server import PtyServer

    responder = PlaybackResponder(list(entries), mode, speed)
    in_turn = mode == "query" and speed == 0
    with tempfile.TemporaryDirectory(prefix="chargebook-playback-") as directory:
        server = PtyServer(responder, framing, Path(directory) / "electrometer")
        if in_turn:
            server.open()
        else:
            server.start()
        try:
            answer = (
                (lambda commands: server.answer_waiting(COMMAND_THROUGH_S, commands))
                if in_turn
                else None
            )
            yield PlaybackPort(server.link_path, answer)
        finally:
            server.stop()


class AnsweredTransport(SerialTransport):
    """A serial transport after each of whose writes the playback answers, in this thread."""

    def __init__(self, *args: Any, answer: Callable[[int], None], **keywords: Any) -> None:
        super().__init__(*args, **keywords)
        self._answer = answer
        self._commands = 1

    def _write_all(self, frames: Sequence[bytes]) -> None:
        self._commands = len(frames)  # one write of several commands: all of them answered
        try:
            super()._write_all(frames)
        finally:
            self._commands = 1

    def _write(self, data: bytes) -> None:
        super()._write(data)
        self._answer(self._commands)


class TrafficRecorder:
    """A TrafficListener that keeps every line, to be written as a playback log."""

    def __init__(self, read_terminator: bytes, write_terminator: bytes, encoding: str = "ascii"):
        self.terminators = {
            TrafficDirection.RECEIVED: read_terminator,
            TrafficDirection.SENT: write_terminator,
        }
        self.encoding = encoding
        self.entries: list[dict[str, object]] = []

    def __call__(self, direction: TrafficDirection, t_s: float, raw: bytes) -> None:
        terminator = self.terminators[direction]
        body = raw[: -len(terminator)] if raw.endswith(terminator) else raw
        line = body.decode(self.encoding, errors="surrogateescape")
        self.entries.append({"t_s": t_s, "dir": direction.value, "line": line})

    def write(self, path: Path) -> Path:
        """Write the log as JSON lines; return its path."""
        text = "".join(json.dumps(entry) + "\n" for entry in self.entries)
        Path(path).write_text(text, encoding="utf-8", errors="surrogateescape")
        return Path(path)
