"""The recorded traffic during a replay: the playback log, a user's traffic log, and the follower.

* :func:`write_playback_log` writes the lines the simulated electrometer plays back (JSON lines
  of ``t_s``, ``dir``, ``line``; see ``drivers_generic.simulator.playback``).
* :func:`read_traffic_log` reads such a log given by the user (``--traffic-log``) in place of
  the traffic stored with the session, and refuses a corrupted or truncated one before anything
  runs, naming the session, the line and what is wrong.
* :class:`TrafficFollower` is the driver's clock and traffic listener while it replays: every
  line the driver sends or receives must be the next recorded line (the replay stops, naming
  the line, where it is not), gets the time the line was recorded with, and is written to the
  replay's session as its own traffic. The lines are written a batch at a time
  (:meth:`TrafficFollower.flush`, before anything else is written: the chain keeps the order in
  which they came), not one statement per line. Queries sent in one write (polls kept in
  flight, :meth:`TrafficFollower.burst`) are the next exchanges' queries, each answer that
  comes is its query's, and each pair is written as recorded.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

from chargebook.acquire.record.store import Store
from chargebook.acquire.replay.recording import NotReplayable, RecordedLine, Recording
from chargebook.drivers_generic.interface import TrafficDirection
from chargebook.drivers_generic.profile import Profile

TX, RX = TrafficDirection.SENT.value, TrafficDirection.RECEIVED.value


class TrafficLogError(NotReplayable):
    """A traffic log is corrupted or truncated; the message names the session, line and fault."""


class Divergence(Exception):
    """The replay did not follow the recording; the message says where and how."""


# ------------------------------------------------------------------------------- line text
def terminator(profile: Profile, direction: str) -> bytes:
    """Return the terminator of lines going ``direction`` (tx: write, rx: read)."""
    framing = profile.framing
    return framing.write_terminator if direction == TX else framing.read_terminator


def line_text(profile: Profile, line: RecordedLine) -> str:
    """Return a recorded line as text without its terminator (undecodable bytes escaped)."""
    end = terminator(profile, line.direction)
    body = line.raw[: -len(end)] if line.raw.endswith(end) else line.raw
    return body.decode(profile.framing.encoding, errors="surrogateescape")


def line_bytes(profile: Profile, direction: str, text: str) -> bytes:
    """Return the raw bytes of a line of text going ``direction``, terminator included."""
    try:
        body = text.encode(profile.framing.encoding, errors="surrogateescape")
    except UnicodeEncodeError:
        body = text.encode("utf-8", errors="surrogateescape")
    return body + terminator(profile, direction)


def shown(text: str, limit: int = 60) -> str:
    """Return a line for a message: quoted, undecodable bytes visible, cut at ``limit``."""
    visible = text.encode("utf-8", errors="surrogateescape").decode("utf-8", errors="replace")
    return repr(visible if len(visible) <= limit else visible[:limit] + "...")


def command_namer(profile: Profile) -> Callable[[str], str | None]:
    """Return a function naming the command of ``profile`` a sent line is (None: none)."""
    from chargebook.drivers_generic.simulator.dialect import template_pattern

    patterns = [
        (spec.name, template_pattern(template))
        for spec in profile.commands.values()
        for template in spec.templates
    ]

    def name_of(text: str) -> str | None:
        return next((name for name, pattern in patterns if pattern.fullmatch(text)), None)

    return name_of


# -------------------------------------------------------------------------------- the logs
def write_playback_log(profile: Profile, lines: Sequence[RecordedLine], path: Path) -> Path:
    """Write the lines as a playback log for ``chargebook simulate --playback``; return it."""
    text = "".join(
        json.dumps({"t_s": line.t_s, "dir": line.direction, "line": line_text(profile, line)})
        + "\n"
        for line in lines
    )
    path.write_text(text, encoding="utf-8", errors="surrogateescape")
    return path


def read_traffic_log(
    path: Path, recording: Recording, profile: Profile, where: Sequence[str]
) -> tuple[RecordedLine, ...]:
    """Return the lines of the traffic log at ``path``, to replay in place of the stored ones.

    ``where[i]`` says in words where the session stood at stored line ``i`` (see
    ``replay_compare.traffic_positions``). Raises TrafficLogError for a line that is not a
    valid entry, a direction other than the one recorded there, or a log with fewer or more
    lines than the session recorded.
    """
    from chargebook.drivers_generic.simulator.playback import PlaybackLogError, read_log

    session = recording.session_id
    try:
        entries = read_log(path)
    except PlaybackLogError as error:
        raise TrafficLogError(f"traffic log for session {session}: {error}") from None
    except (OSError, UnicodeError) as error:
        raise TrafficLogError(f"traffic log {path} cannot be read: {error}") from None
    stored = recording.lines
    _refuse_a_missing_or_repeated_line(path, session, entries, stored, profile, where)
    if len(entries) < len(stored):
        last = len(entries)
        raise TrafficLogError(
            f"traffic log {path} for session {session} is truncated: it ends after line {last}, "
            f"the session recorded {len(stored)} lines; it stops {where[last]}"
        )
    if len(entries) > len(stored):
        raise TrafficLogError(
            f"traffic log {path} has {len(entries)} lines, session {session} recorded "
            f"{len(stored)}: line {len(stored) + 1} onwards belongs to no part of the session"
        )
    lines = []
    for index, ((t_s, direction, text), original) in enumerate(zip(entries, stored, strict=True)):
        if direction != original.direction:
            raise TrafficLogError(
                f"traffic log {path} line {index + 1}: dir = {direction!r} is not allowed; "
                f"session {session} recorded {original.direction!r} there ({where[index]})"
            )
        lines.append(RecordedLine(index, t_s, direction, line_bytes(profile, direction, text)))
    return tuple(lines)


def _refuse_a_missing_or_repeated_line(
    path: Path,
    session: int,
    entries: Sequence[tuple[float, str, str]],
    stored: Sequence[RecordedLine],
    profile: Profile,
    where: Sequence[str],
) -> None:
    """Raise TrafficLogError naming the line if the log is the session's traffic with one line
    deleted from its middle, written twice or added; return otherwise."""
    if abs(len(entries) - len(stored)) != 1:
        return

    def same(entry: tuple[float, str, str], line: RecordedLine) -> bool:
        _, direction, text = entry
        return direction == line.direction and line_bytes(profile, direction, text) == line.raw

    first = next(
        (i for i, (e, line) in enumerate(zip(entries, stored, strict=False)) if not same(e, line)),
        min(len(entries), len(stored)),
    )
    counts = (
        f"traffic log {path} has {len(entries)} lines, session {session} recorded {len(stored)}"
    )
    if len(entries) < len(stored) and first < len(entries):
        rest = zip(entries[first:], stored[first + 1 :], strict=True)
        if all(same(entry, line) for entry, line in rest):
            missing = stored[first]
            raise TrafficLogError(
                f"{counts}: line {first + 1} of the session ({missing.direction} "
                f"{shown(line_text(profile, missing))}, {where[first]}) is missing from the log, "
                f"deleted between log lines {first} and {first + 1}"
            )
    if len(entries) > len(stored):
        rest = zip(entries[first + 1 :], stored[first:], strict=True)
        if not all(same(e, line) for e, line in rest):
            return
        if first > 0 and same(entries[first], stored[first - 1]):
            raise TrafficLogError(
                f"{counts}: log line {first + 1} repeats line {first} "
                f"({shown(entries[first][2])}), a line written twice"
            )
        if first == len(stored):
            return  # one line past the end: the caller says it belongs to no part
        raise TrafficLogError(
            f"{counts}: log line {first + 1} ({shown(entries[first][2])}) is not in the "
            f"session's traffic, a line added before line {first + 1} of the session "
            f"({where[first]})"
        )


# ---------------------------------------------------------------------------- the follower
@dataclass(frozen=True, slots=True)
class TrafficNote:
    """A line a what-if replay sent differently from the recording (same command)."""

    index: int
    recorded: str
    sent: str


class TrafficFollower:
    """The driver's clock and traffic listener during a replay (see the module docstring).

    ``same_command(recorded, sent)`` decides whether a sent line that differs from the
    recorded one is still the same command (a what-if plan sets another bias): then it is
    noted, not refused. Without it every difference stops the replay.
    """

    def __init__(
        self,
        lines: Sequence[RecordedLine],
        profile: Profile,
        *,
        same_command: Callable[[str, str], bool] | None = None,
    ) -> None:
        self.lines = tuple(lines)
        self.profile = profile
        self.same_command = same_command
        self.position = 0
        #: While a recorded input is applied: its place (lines recorded before it).
        self.input_position: int | None = None
        self.notes: list[TrafficNote] = []
        self.store: Store | None = None
        self.session_id: int | None = None
        self._last_received_id: int | None = None
        #: Lines seen, not yet written: (session, t_s, recorded_at, direction, bytes) each,
        #: and the row id the first of them will have.
        self._unwritten: list[tuple[int | None, float, str, str, bytes]] = []
        self._next_id = 0
        self._last_t_s = self.lines[0].t_s if self.lines else 0.0
        #: Queries sent in one write whose answers are still to come (see :meth:`burst`).
        self._in_flight = 0
        #: The answers to queries kept in flight, as they came: (line index, row id) each.
        self.answered: list[tuple[int, int | None]] = []
        self._sent_at = ""  # when the queries in flight were sent (``recorded_at``)

    def attach(self, store: Store, session_id: int) -> None:
        """Write the lines from now on to ``session_id`` in ``store``: each batch as the store
        is about to write anything else (its ``before_write``), so that the lines come first
        in the session's chain, and the lines' row ids are counted, not asked of the file
        (nothing else writes raw lines to the store meanwhile: the replay holds the station)."""
        self.store, self.session_id = store, session_id
        self._next_id = store.newest_traffic_id() + 1
        store.before_write = self.flush

    def detach(self) -> None:
        """Write the lines not yet written, and stop writing to the store."""
        self.flush()
        if self.store is not None and self.store.before_write == self.flush:
            self.store.before_write = None

    @property
    def last_received_id(self) -> int | None:
        """Return the row id of the latest received line (the line a sample came from), which
        it has or will have once written (None: no line received since attached)."""
        return self._last_received_id

    def flush(self) -> None:
        """Write the lines seen and not yet written, in one statement (the store calls it
        before anything else is written: see :meth:`attach`)."""
        if not self._unwritten or self.store is None:
            return
        lines, self._unwritten = self._unwritten, []  # the store's before_write comes back here
        self.store.add_traffic_many(lines)
        self._next_id += len(lines)
        newest = self.store.newest_traffic_id()
        if newest != self._next_id - 1:
            raise RuntimeError(
                f"the replay's raw lines were written up to row {newest}, not {self._next_id - 1}"
                ": something else wrote raw lines to the station file during the replay"
            )

    @property
    def finished(self) -> bool:
        """Return True once every recorded line has been seen."""
        return self.position >= len(self.lines)

    @property
    def last_t_s(self) -> float:
        """Return the recorded time of the latest line seen (the first line's before any)."""
        return self._last_t_s

    @property
    def played_t_s(self) -> float:
        """Return the recorded time of the latest line seen (-inf before any).

        While a recorded input is applied (``input_position`` set), the latest line recorded
        before that input: lines read since (lines pushed before a command's answer, read with
        it) came after the input in the original.
        """
        if self.input_position is not None and self.input_position < self.position:
            return self.lines[self.input_position - 1].t_s if self.input_position else -math.inf
        return self._last_t_s if self.position else -math.inf

    def clock(self) -> float:
        """Return the recorded time of the next line: the driver stamps that line with it."""
        if self.position < len(self.lines):
            return self.lines[self.position].t_s
        return self._last_t_s

    def next_sent_t_s(self, text: str | None) -> float:
        """Return the recorded time of the next line sent that reads ``text`` (inf: none)."""
        for line in self.lines[self.position :]:
            if line.direction == TX and self.text(line) == text:
                return line.t_s
        return math.inf

    def text(self, line: RecordedLine) -> str:
        """Return a recorded line as text (see :func:`line_text`)."""
        return line_text(self.profile, line)

    def __call__(self, direction: TrafficDirection, t_s: float, raw: bytes) -> None:
        """Check one line against the recording, then write it to the replay's session."""
        value = TrafficDirection(direction).value
        raw = bytes(raw)
        position = self.position
        if position < len(self.lines):
            expected = self.lines[position]
            if expected.raw != raw or expected.direction != value:
                self._check(value, raw)
        else:
            self._check(value, raw)
        self._last_t_s = t_s
        if self.store is not None:
            if value == RX:
                self._last_received_id = self._next_id + len(self._unwritten)
            self._unwritten.append((self.session_id, t_s, self.store.stamp(), value, raw))
        self.position = position + 1

    def burst(self, direction: TrafficDirection, t_s: float, lines: Sequence[bytes]) -> None:
        """Check lines sent or received together against the recording, then write them.

        Queries sent in one write (polls kept in flight) are exchanges of the recording, one
        line each way: the ``k`` lines sent are checked against the next ``k`` exchanges'
        queries, and each line received after them against its query's answer; each pair is
        written as the recording has it, query then answer, when its answer comes, and noted
        in :attr:`answered`. Other lines are taken one by one, as :meth:`__call__` takes them.
        """
        value = TrafficDirection(direction).value
        if value == TX and len(lines) > 1:
            self._send_in_flight(lines)
            return
        for raw in lines:
            if value == RX and self._in_flight:
                self._answer_in_flight(bytes(raw))
            else:
                self(direction, self.clock(), raw)

    def _send_in_flight(self, lines: Sequence[bytes]) -> None:
        """Check queries sent in one write against the queries of the next exchanges."""
        if self._in_flight:
            raise Divergence(
                f"at traffic line {self.position + 1} the replay sent {len(lines)} queries "
                f"while {self._in_flight} earlier ones were still unanswered"
            )
        for number, raw in enumerate(lines):
            place = self.position + 2 * number
            after = self.lines[place + 1] if place + 1 < len(self.lines) else None
            expected = self.lines[place] if place < len(self.lines) else None
            if expected is None or expected.raw != raw or expected.direction != TX:
                self.position = place
                self._check(TX, bytes(raw))
            if after is None or after.direction != RX:
                raise Divergence(
                    f"traffic line {place + 1} was sent with others in one write, but the "
                    "recording has no answer to it on the next line"
                )
        self._in_flight = len(lines)
        if self.store is not None:  # one write, one time: the chain links such rows fastest
            self._sent_at = self.store.stamp()

    def _answer_in_flight(self, raw: bytes) -> None:
        """Check the answer to the oldest query in flight, then write the pair."""
        query, answer = self.lines[self.position], self.lines[self.position + 1]
        if answer.raw != raw:
            self.position += 1
            self._check(RX, raw)
        row_id = None
        if self.store is not None:
            stamp = self._sent_at
            row_id = self._next_id + len(self._unwritten) + 1
            self._unwritten.append((self.session_id, query.t_s, stamp, TX, query.raw))
            self._unwritten.append((self.session_id, answer.t_s, stamp, RX, raw))
            self._last_received_id = row_id
        self.answered.append((answer.index, row_id))
        self._last_t_s = answer.t_s
        self.position += 2
        self._in_flight -= 1

    def _check(self, direction: str, raw: bytes) -> None:
        """Raise Divergence for a line that is not the recorded one (note it, for the same
        command sent with other values in a what-if)."""
        verb = "sent" if direction == TX else "received"
        got = line_text(self.profile, RecordedLine(self.position, 0.0, direction, raw))
        if self.position >= len(self.lines):
            raise Divergence(
                f"after the last recorded line ({len(self.lines)}) the replay {verb} {shown(got)}"
            )
        expected = self.lines[self.position]
        recorded = self.text(expected)
        number = self.position + 1
        if (
            direction == TX == expected.direction
            and self.same_command is not None
            and self.same_command(recorded, got)
        ):
            self.notes.append(TrafficNote(self.position, recorded, got))
            return
        said = "sent" if expected.direction == TX else "received"
        raise Divergence(
            f"at traffic line {number} the replay {verb} {shown(got)} where the original "
            f"{said} {shown(recorded)}"
        )
