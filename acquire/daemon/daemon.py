"""The acquisition daemon: one process that owns the electrometer and the station database.

Three parts, wired here:

* an :class:`InstrumentLink` thread that owns the (synchronous) driver: it carries out the
  engine's commands in order (zero, start, stop, set bias, and the bench's beam and bias
  switch), reads samples while a reading is armed (pushed lines in stream mode, ``read_charge``
  polled at :data:`POLL_INTERVAL_S` in query mode), records every raw line as traffic, and
  reconnects with backoff when the instrument goes away. The raw lines of one burst (a pushed
  stream drained up to :data:`MAX_SAMPLES_PER_BATCH` lines, or one command's exchange) are
  committed together, before the engine hears of any sample among them, by its
  :class:`~chargebook.acquire.daemon.committer.Committer` thread, while it reads the next
  ones (one transaction for all the lines read during the previous commit);
* the :class:`~chargebook.acquire.engine.engine.Engine`, driven only from the asyncio loop;
* the :class:`~chargebook.acquire.daemon.server.RpcServer` on the Unix socket.

Every reading is committed by the engine before :meth:`Daemon.publish` tells any client.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import json
import logging
import os
import queue
import threading
import time
import traceback
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from chargebook.acquire import protocol
from chargebook.acquire.daemon import sd_notify
from chargebook.acquire.daemon.committer import RETRY_S, Committer
from chargebook.acquire.daemon.server import Connection, RpcServer
from chargebook.acquire.engine import driver_commands, inputs
from chargebook.acquire.engine.engine import DAEMON_ACTOR, Engine
from chargebook.acquire.engine.states import IllegalTransition
from chargebook.acquire.engine.visit_desk import VisitDesk
from chargebook.acquire.record import events as ev
from chargebook.acquire.record import unrecorded
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.health import LOCKED, RecordFiles, commit_failure, not_writable
from chargebook.acquire.record.station_lock import StationLock
from chargebook.acquire.record.store import (
    BUSY_TIMEOUT_MS,
    EventRow,
    Store,
    StoreError,
    TrafficLine,
    require_writable,
)
from chargebook.acquire.session import stored_result
from chargebook.acquire.session.register_requests import REGISTER_METHODS
from chargebook.corrections.errors import InputError
from chargebook.drivers_generic.interface import (
    Capability,
    Electrometer,
    InstrumentDisconnected,
    InstrumentError,
    InstrumentTimeout,
    NotSupported,
    ProtocolError,
    Sample,
    SampleBurst,
    TrafficDirection,
    TrafficListeners,
)

log = logging.getLogger(__name__)

#: How often a query-mode electrometer is read while a reading is armed, s.
POLL_INTERVAL_S = 0.05
#: How often the engine's timers are advanced, s.
TICK_S = 0.05
#: Between two closed sessions whose stored result the daemon refreshes, s: the loop serves
#: readings and clients meanwhile.
REFRESH_PAUSE_S = 0.01
#: Shortest time between two snapshots that only show the live charge, s.
LIVE_INTERVAL_S = 0.25
#: While readings stream, shortest time between two computations of the results (with their
#: uncertainty budget and dose) and of the collecting set's statistics and flags, s: each
#: reading is sent at once (with its label and the flags of its own status), and the set's
#: statistics and the results follow in a delta of their own at most this often. Once readings
#: stop (the set complete, paused, interrupted ...) they are computed with the change that
#: stopped them, and a set still collecting gets them within this time of its latest reading.
RESULTS_INTERVAL_S = 0.1
#: The states in which readings stream in from the instrument (results may follow them).
STREAMING_STATES = frozenset({protocol.EngineState.COLLECTING, protocol.EngineState.SETTLING})
#: The audit events of the daemon's own starts and stops: the last one says how it last ended.
LIFECYCLE_EVENTS = (EventKind.DAEMON_STARTED, EventKind.DAEMON_RESTARTED, EventKind.DAEMON_STOPPED)
#: How ``daemon_restarted`` says a previous run ended that could not record its stop, the raw
#: lines it held set aside (``record.unrecorded``) and recorded by this start.
STOPPED_LINES_SET_ASIDE = "stopped, its stop not recorded: its raw lines were set aside"
#: Most pushed lines read in one burst (one traffic commit, one hand-over to the engine). Each
#: commit waits for an fsync (some 4-10 ms on the development machine), so under a flood the
#: burst's size sets how much of that wait each line bears: at 4096 lines about 1-2 µs. A burst
#: of 4096 lines at 100,000 lines/s is read in about 40 ms; an instrument's own pace (hundreds of
#: lines a second) ends a burst at the first pause of BURST_GAP_S long before.
MAX_SAMPLES_PER_BATCH = 4096
#: A pause between pushed lines longer than this ends a burst, s.
BURST_GAP_S = 0.002
#: While samples are read, longest time raw lines wait in memory for the commit before the
#: next post to the engine (see :class:`InstrumentLink`), s.
LINES_COMMIT_S = 0.1
#: How each traffic direction is written in the store.
_DIRECTION_TEXT = {direction: direction.value for direction in TrafficDirection}
#: Timeouts in a row after which the instrument counts as lost.
TIMEOUTS_BEFORE_LOST = 3
#: Reconnection backoff: first pause and longest pause, s.
RECONNECT_FIRST_S, RECONNECT_MAX_S = 0.2, 2.0
#: Raw lines held in memory at most while the record cannot commit (some 100 bytes each); at
#: the bound the electrometer is no longer read until the lines are committed.
MAX_HELD_LINES = 200_000
#: Share of MAX_HELD_LINES at which the operator is told the bound nears.
HELD_WARNING_SHARE = 0.8
#: How often the daemon checks that its database and -wal files are the ones it opened, s.
FILES_CHECK_S = 1.0
#: How long a commit of raw lines waits for another program's write lock, ms: the lines are
#: held meanwhile, so the instrument thread never stops reading the port for long.
LINES_WAIT_MS = 200
#: Longest wait, as the instrument thread ends, for the last commit of its lines, s: lines that
#: still cannot be committed then are set aside in a file beside the database
#: (``record.unrecorded``), recorded by the next start.
STOP_COMMIT_S = 4.0


class LineRef:
    """Raw lines received from the instrument together (one read), kept for the next traffic
    commit; ``id`` is the row id of the first once committed (the others follow it, one id
    each; None before, or if they could not be recorded). A sample carries the LineRef of the
    lines it was read from and its place among them, so its reading names its line."""

    __slots__ = ("id",)

    def __init__(self) -> None:
        self.id: int | None = None

    def written(self, line_id: int | None) -> None:
        """Take the line's row id, as the store tells it (None: not written after all)."""
        self.id = line_id


#: Samples read together, handed to the engine together: the samples, and where each one's
#: raw line is: (LineRef, None) when they are the LineRef's lines one for one, in order, else
#: (None, [(LineRef or None, place among its lines)] one a sample).
SampleChunk = tuple[list[Sample], LineRef | None, list[tuple[LineRef | None, int]] | None]


@dataclass(frozen=True)
class DaemonOptions:
    """What ``chargebook serve`` was asked for."""

    profile: str
    db_path: Path
    socket_path: Path
    port: str | None = None
    resource: str | None = None
    plan: str = "default"
    bench_control: str | None = None
    time_scale: float = 1.0
    thresholds: Any = None  # corrections.stability.Thresholds; None: the documented defaults
    visa_library: str | None = None  # pyvisa's library for a resource; None: $PYVISA_LIBRARY/@py
    socket_group: str | None = None  # a group that may use the sockets (0750 / 0660); None: 0700
    station_name: str | None = None  # the station's name; None: keep the recorded one
    sensor_port: str | None = None  # serial port of a thermometer-barometer; None: typed air
    sensor_profile: str = "sensor-plain"  # its profile

    @property
    def watch_socket_path(self) -> Path:
        """The watch-only socket, beside the control socket."""
        return self.socket_path.parent / protocol.WATCH_SOCKET_NAME


# ------------------------------------------------------------------------ instrument thread
class InstrumentLink(threading.Thread):
    """The thread that owns the electrometer (see the module docstring).

    ``post(kind, payload)`` is called from this thread for ``samples`` ((generation, list of
    :data:`SampleChunk`)), ``connected`` (identity text or None),
    ``lost`` (message) and ``fault`` (message).
    ``flush()`` commits the raw lines recorded so far and returns False when the record cannot
    commit; a :class:`Committer` calls it, in a thread of its own, before every ``post`` and
    after every turn of this thread's loop, so no line waits longer than one turn, and this
    thread reads on while the commit waits for its fsync (group commit: the lines read
    meanwhile go in the next one); except that while samples are read, lines that nothing is
    posted after (the answers to the commands that re-arm a reading, stale samples) wait for the
    next post's commit, at most :data:`LINES_COMMIT_S`: one commit (one fsync) a reading, not
    one for the commands and another for the sample. What the engine must hear of after lines
    that could not be committed is held, in order, and posted once they are. While
    ``backlog_full`` is set (too many lines held) no samples are read.
    """

    def __init__(
        self,
        electrometer: Electrometer,
        post: Callable[[str, Any], None],
        *,
        bench: Any = None,
        clock: Callable[[], float] = time.monotonic,
        flush: Callable[[], bool] = lambda: True,
        line_of: Callable[[], LineRef | None] = lambda: None,
        lines_read: Callable[[], list[tuple[LineRef, int]]] = list,
    ) -> None:
        super().__init__(name="instrument", daemon=True)
        self.electrometer = electrometer
        self.post = post
        #: Commits the lines and posts what follows them, while this thread reads on.
        self.committer = Committer(flush, post)
        self.line_of = line_of  # the latest line received: the one a sample just read came from
        #: The LineRefs of the lines received since it was last called, and how many lines each
        #: stands for (it forgets them as it tells them).
        self.lines_read = lines_read
        self.bench = bench
        self.clock = clock
        self.inbox: queue.Queue[tuple[str, Any]] = queue.Queue()
        self.generation: int | None = None  # samples are read while this is set
        #: The generation the loop asked for last (set at once, where ``generation`` follows
        #: in order with the commands): samples of an older one are not posted, since the
        #: loop would drop them, and their lines wait for the next commit.
        self.wanted_generation: int | None = None
        #: The session the lines now sent and received belong to: set in order with the
        #: commands (:meth:`lines_for`), so a command issued for one session is recorded with
        #: it even when the loop has moved on to the next session before the line goes out.
        self.session_id: int | None = None
        self.fresh_after_s = 0.0  # samples received before this are stale
        self.connected = False
        self._timeouts = 0
        self._next_poll_s = 0.0
        self._quit = threading.Event()
        self._burst_lines = 0  # how many lines the last burst of pushed lines brought
        self._reply_note: str | None = None  # the driver's note on late or slow answers
        self.backlog_full = False

    # -- called from the asyncio loop ----------------------------------------------------------
    def send(self, command: driver_commands.Command) -> None:
        """Queue one engine command."""
        self._tell("command", command)

    def lines_for(self, session_id: int | None) -> None:
        """Record the lines of the commands queued from now on with ``session_id``."""
        self._tell("session", session_id)

    def sample_for(self, generation: int | None) -> None:
        """Read samples tagged ``generation`` from now on (None: stop reading)."""
        self.wanted_generation = generation
        self._tell("sampling", generation)

    def stop(self) -> None:
        """Ask the thread to end (it closes the instrument)."""
        self._quit.set()
        self._tell("quit", None)

    def _tell(self, kind: str, value: Any) -> None:
        """Queue one message for the thread, and cut short its wait for pushed lines so that
        it takes the message now: a re-arm goes out within the gap between two pushed
        readings, not after the next line (which would then be stale)."""
        self.inbox.put((kind, value))
        self.electrometer.wake()

    # -- the thread ----------------------------------------------------------------------------
    def run(self) -> None:
        self.committer.start()
        try:
            while not self._quit.is_set():
                if not self.connected:
                    self._connect()
                    continue
                self._serve_once()
        finally:
            with contextlib.suppress(Exception):
                self.electrometer.close()
            self.committer.stop(STOP_COMMIT_S)

    def _hand_over(self, kind: str, payload: Any) -> None:
        """Have the raw lines recorded so far committed, then ``kind`` posted to the engine's
        loop (held, in order, while the lines cannot be committed)."""
        self.committer.hand_over(kind, payload)

    def _release(self) -> None:
        """Have the raw lines recorded so far committed, and what was held posted."""
        self.committer.commit_soon()

    def _connect(self) -> None:
        delay_s = RECONNECT_FIRST_S
        said: str | None = None
        while not self._quit.is_set():
            try:
                self.electrometer.open()
            except InstrumentError as error:
                why = str(error)
                level = logging.INFO if why == said else logging.WARNING  # say each new cause
                log.log(level, "electrometer not reachable (%s); retrying in %.1f s", why, delay_s)
                if why != said:
                    said = why
                    self._hand_over("unreachable", f"electrometer not reachable: {why}")
                self._drain_while_away()
                if self._quit.wait(delay_s):
                    return
                delay_s = min(delay_s * 2, RECONNECT_MAX_S)
                continue
            self.connected, self._timeouts = True, 0
            self._hand_over("connected", self._identity())
            return

    def _identity(self) -> str | None:
        try:
            identity = self.electrometer.identify()
        except NotSupported:
            return None
        except InstrumentError as error:
            log.warning("the electrometer did not identify itself: %s", error)
            return None
        return ", ".join(
            part
            for part in (identity.manufacturer, identity.model, identity.serial, identity.firmware)
            if part
        )

    def _drain_while_away(self) -> None:
        """Drop queued instrument commands while disconnected; keep bench commands."""
        while True:
            try:
                kind, value = self.inbox.get_nowait()
            except queue.Empty:
                return
            if kind == "quit":
                self._quit.set()
                return
            if kind == "sampling":
                self.generation = value
            elif kind == "session":
                self.session_id = value
            elif kind == "command" and isinstance(value, driver_commands.BENCH_COMMANDS):
                self._bench(value)
            else:
                log.info("electrometer away: dropped command %s", value)

    def _serve_once(self) -> None:
        self.lines_read()  # forget the lines of the last turn: only a read's own are looked up
        pushes = bool(
            self.electrometer.capabilities & {Capability.STREAM, Capability.PUSH_READINGS}
        )
        if self.generation is None or self.backlog_full:
            timeout_s = 0.2
        elif pushes:
            timeout_s = 0.0
        else:
            timeout_s = max(0.0, self._next_poll_s - self.clock())
        try:
            kind, value = (
                self.inbox.get(timeout=timeout_s) if timeout_s else self.inbox.get_nowait()
            )
        except queue.Empty:
            kind, value = "", None
        try:
            while kind:  # everything queued, so that one commit covers the commands' lines
                if kind == "quit":
                    return
                if kind == "sampling":
                    self.generation = value
                elif kind == "session":
                    self.session_id = value
                elif kind == "command":
                    self._execute(value)
                try:
                    kind, value = self.inbox.get_nowait()
                except queue.Empty:
                    kind = ""
            if self.generation is not None and self.inbox.empty() and not self.backlog_full:
                self._read_samples(pushes)
        except InstrumentDisconnected as error:
            self._lost(f"the electrometer was disconnected: {error}")
        except InstrumentTimeout as error:
            self._timeouts += 1
            if self._timeouts >= TIMEOUTS_BEFORE_LOST:
                self._lost(f"the electrometer stopped answering: {error}")
        except ProtocolError as error:
            log.warning("rejected a line from the electrometer: %s", error)
        except InstrumentError as error:
            self._hand_over("fault", f"the electrometer refused a command: {error}")
        finally:
            self._end_turn()
            self._tell_reply_note()

    def _end_turn(self) -> None:
        """Commit the turn's raw lines (see :meth:`_release`), unless samples are being read
        and the lines last committed less than LINES_COMMIT_S ago: then the lines wait for the
        commit before the next post (a sample's), which records them all at once."""
        sampling = self.generation is not None and not self.backlog_full
        committer = self.committer
        if (
            sampling
            and not committer.holding()
            and time.monotonic() - committer.flushed_at < LINES_COMMIT_S
        ):
            return
        self._release()

    def _tell_reply_note(self) -> None:
        """Post the driver's note on late or slow answers when it changed."""
        note = getattr(self.electrometer, "reply_note", None)
        if note != self._reply_note:
            self._reply_note = note
            self._hand_over("reply_note", note)

    def _lost(self, message: str) -> None:
        self.connected = False
        self._hand_over("lost", message)
        with contextlib.suppress(Exception):
            self.electrometer.close()

    def _execute(self, command: driver_commands.Command) -> None:
        if isinstance(command, driver_commands.BENCH_COMMANDS):
            self._bench(command)
            return
        match command:
            case driver_commands.Zero():
                self.electrometer.zero()
            case driver_commands.StartIntegration():
                self.electrometer.start_integration()
            case driver_commands.StopIntegration():
                self.electrometer.stop_integration()
            case driver_commands.SetBias(bias_V=bias_V):
                self.electrometer.set_bias(bias_V)
        self.fresh_after_s = self.clock()
        self._timeouts = 0

    def _bench(self, command: driver_commands.BenchCommand) -> None:
        from chargebook.acquire.daemon.bench import BenchError

        if self.bench is None:
            return
        try:
            match command:
                case driver_commands.DeliverBeam(monitor_units=monitor_units):
                    self.bench.deliver(monitor_units)
                case driver_commands.TurnBiasSwitch(bias_V=bias_V):
                    self.bench.turn_bias(bias_V)
        except BenchError as error:
            self._hand_over("bench_refused", str(error))

    def _read_samples(self, pushes: bool) -> None:
        chunks: list[SampleChunk] = []
        try:
            if pushes:
                self._drain_pushed(chunks)
            else:
                now_s = self.clock()
                if now_s < self._next_poll_s:
                    return
                self._next_poll_s = now_s + POLL_INTERVAL_S
                chunks.append(([self.electrometer.read_charge()], None, [(self.line_of(), 0)]))
            self._timeouts = 0
        finally:  # samples read before a disconnection are still handed over
            fresh = [chunk for chunk in map(self._fresh, chunks) if chunk[0]]
            if fresh and self.generation == self.wanted_generation:
                self._hand_over("samples", (self.generation, fresh))

    def _fresh(self, chunk: SampleChunk) -> SampleChunk:
        """Return the chunk without its samples received before ``fresh_after_s``."""
        samples, ref, places = chunk
        after_s = self.fresh_after_s
        if places is None and after_s <= samples[0].t_s == samples[-1].t_s:
            return chunk  # a burst parsed at once: all its lines arrived together, in time
        pairs = places if places is not None else [(ref, place) for place in range(len(samples))]
        kept = [index for index, sample in enumerate(samples) if sample.t_s >= after_s]
        return [samples[i] for i in kept], None, [pairs[i] for i in kept]

    def _drain_pushed(self, chunks: list[SampleChunk]) -> None:
        """Read a burst of pushed lines: the first within POLL_INTERVAL_S, then each next read
        within BURST_GAP_S, at most MAX_SAMPLES_PER_BATCH samples. A lone line after a burst
        of one line ends its burst at once: an instrument that sends its lines one at a time
        (tens or hundreds a second) is not waited on for a next line that is not coming.

        A rejected line is logged and skipped; the burst goes on.
        """
        timeout_s = POLL_INTERVAL_S
        count = lines = 0
        try:
            while count < MAX_SAMPLES_PER_BATCH:
                self.lines_read()  # forget lines recorded outside this read (commands' answers)
                burst = self.electrometer.read_samples(timeout_s)
                for error in burst.rejected:
                    log.warning("rejected a line from the electrometer: %s", error)
                if not burst.count:
                    return
                lines += burst.count
                if burst.samples:
                    chunks.append(_chunk(burst, self.lines_read()))
                    count += len(burst.samples)
                if lines == 1 and self._burst_lines == 1:
                    return
                timeout_s = BURST_GAP_S
        finally:
            self._burst_lines = lines


def _chunk(burst: SampleBurst, read: list[tuple[LineRef, int]]) -> SampleChunk:
    """Return a burst's samples with where each one's line is, from the LineRefs its read
    recorded (each with how many lines it stands for)."""
    if burst.lines is None and len(read) == 1 and read[0][1] == len(burst.samples):
        return burst.samples, read[0][0], None
    lines: list[tuple[LineRef | None, int]] = [
        (ref, place) for ref, count in read for place in range(count)
    ]
    places = burst.lines if burst.lines is not None else range(len(burst.samples))
    return burst.samples, None, [lines[p] if 0 <= p < len(lines) else (None, 0) for p in places]


def _line_ids(
    samples: list[Sample], ref: LineRef | None, places: list[tuple[LineRef | None, int]] | None
) -> Sequence[int | None]:
    """Return the row id of each sample's raw line (None where it was not recorded)."""
    if places is None:
        first = None if ref is None else ref.id
        return [None] * len(samples) if first is None else range(first, first + len(samples))
    return [None if line is None or line.id is None else line.id + place for line, place in places]


def _rest(chunk: SampleChunk, taken: int) -> SampleChunk:
    """Return ``chunk`` without its first ``taken`` samples."""
    samples, ref, places = chunk
    pairs = places or [(ref, place) for place in range(len(samples))]
    return samples[taken:], None, pairs[taken:]


def _event_info(event: EventRow) -> protocol.EventInfo:
    """Return the ``event`` notification's params for one committed audit event."""
    return {
        "id": event.id,
        "session_id": event.session_id,
        "recorded_at": event.recorded_at,
        "actor": event.actor,
        "kind": event.kind,
        "detail": json.loads(event.detail_json),
    }


def _event_line(event: EventRow) -> bytes:
    """Return the encoded ``event`` notification of one committed audit event."""
    return protocol.encode_from_daemon(
        protocol.notification(protocol.NOTIFY_EVENT, _event_info(event))
    )


def _fitted(snapshot: protocol.Snapshot) -> protocol.Snapshot:
    """Return ``snapshot``, or, if it is too long for one message, a copy without the readings
    of the sets other than the current one."""
    try:
        _snapshot_notification(snapshot)
    except ValueError:
        current = snapshot["current_set"]["id"] if snapshot["current_set"] else None
        sets = [
            entry if entry["id"] == current else _without_readings(entry)
            for entry in snapshot["sets"]
        ]
        return {**snapshot, "sets": sets}
    return snapshot


def _without_readings(entry: protocol.SetInfo) -> protocol.SetInfo:
    """Return a copy of a set's entry without its readings (statistics and flags kept)."""
    trimmed = entry.copy()
    trimmed["readings"] = []
    return trimmed


def _snapshot_notification(snapshot: protocol.Snapshot) -> bytes:
    """Return the encoded ``snapshot`` notification; ValueError if it is over the size limit."""
    return protocol.encode_from_daemon(protocol.notification(protocol.NOTIFY_SNAPSHOT, snapshot))


# --------------------------------------------------------------------------------- daemon
class Daemon:
    """Wires the instrument thread, the engine and the socket server; see the module docstring."""

    def __init__(self, options: DaemonOptions, *, clock: Callable[[], float] = time.monotonic):
        self.options = options
        self.clock = clock
        self.store: Store | None = None
        self.station_lock = StationLock(options.db_path)
        self.engine: Engine | None = None
        self.visits: VisitDesk | None = None
        self.link: InstrumentLink | None = None
        self.server = RpcServer(options.socket_path, self.dispatch, group=options.socket_group)
        #: The watch-only socket beside it: hello, subscribe and status, no action.
        self.watch_server = RpcServer(
            options.watch_socket_path,
            self.dispatch,
            group=options.socket_group,
            methods=protocol.WATCH_METHODS,
        )
        self._events: asyncio.Queue[tuple[str, Any]] = asyncio.Queue()
        self._lines_fault: str | None = None  # why the last traffic commit failed (thread)
        self._lines_tried_at = -RETRY_S  # when the thread last tried a commit that failed
        self._lines_failing_since: float | None = None  # first failed commit of lines held now
        self._lines_told: tuple[str | None, int] = (None, 0)  # the last news of held lines
        self._lines_told_at = 0.0
        self._held_events: collections.deque[tuple[str, Any]] = collections.deque()
        self._faults: dict[str, str] = {}  # what cannot commit: "lines", "engine", "files"
        self._held_lines = 0
        self._files: RecordFiles | None = None
        self._files_checked_at = 0.0
        self._events_tried_at = 0.0
        self._latest_received: LineRef | None = None  # the newest received line's ref
        #: The LineRefs of lines received since the instrument thread last took them, each
        #: with how many lines it stands for (instrument thread only).
        self._lines_read: list[tuple[LineRef, int]] = []
        self._generation = 0
        self._line_session: int | None = None  # the session last given to the link's lines
        #: The latest snapshot built: (engine.seq it shows, snapshot).
        self._built: tuple[int, protocol.Snapshot] | None = None
        #: The snapshot every subscriber holds, the base of the next delta (None: no subscriber).
        self._sent: protocol.Snapshot | None = None
        self._sampled_run: int | None = None  # the engine's sampling_run the link reads for
        self._published_seq = -1
        #: Events committed and not yet broadcast, in order (the store hands them over).
        self._emitted: list[EventRow] = []
        self._last_live: tuple[float, float | None] = (0.0, None)
        #: When results were last computed for the subscribers (time.monotonic), and the
        #: timer (then the task) that sends the results readings left behind.
        self._results_at = -RESULTS_INTERVAL_S
        self._results_timer: asyncio.TimerHandle | None = None
        self._results_task: asyncio.Task[None] | None = None
        self._stopping = asyncio.Event()
        self._stop_reason = "asked to stop"
        #: At the stop, raw lines the record could not commit: said in words (None: none), and
        #: the side file they were set aside in (None: none, or it could not be written).
        self.stop_problem: str | None = None
        self.set_aside_in: Path | None = None
        self._stop_cause: str | None = None  # why the stop could not be recorded, in words
        #: The runs whose raw lines this start recorded from side files: pid -> why it stopped.
        self._set_aside_by: dict[int | None, str | None] = {}
        self._station_uuid: str | None = None

    # -- starting and stopping -----------------------------------------------------------------
    def _build(self) -> None:
        from chargebook.drivers_generic import build_electrometer, load_profile

        options = self.options
        profile = load_profile(options.profile)
        for server in (self.server, self.watch_server):
            server.prepare_directory()  # a refused socket folder leaves the station file untouched
        require_writable(options.db_path)  # refused in words, before the lock file is made
        self.station_lock.acquire()  # before anything is written: one daemon per station file
        self.store = Store.open(options.db_path)
        self.store.on_events_committed = self._emitted.extend
        self.store.remember_rows()  # the one writer, under the station lock
        self.store.results_on_close = stored_result.stored_row  # kept as each session closes
        self._station_uuid = self.store.station().uuid  # whose lines a stop may set aside
        self._record_set_aside()
        if options.station_name:
            self.store.name_station(options.station_name)
        self._files = RecordFiles.taken_now(options.db_path)
        bench = None
        if options.bench_control:
            from chargebook.acquire.daemon.bench import Bench

            bench = Bench(options.bench_control)
        electrometer = build_electrometer(
            profile,
            port=options.port,
            resource=options.resource,
            traffic=TrafficListeners(self._record_traffic, self._record_traffic_burst),
            clock=self.clock,
            visa_library=options.visa_library,
        )
        self.engine = Engine(
            self.store,
            capabilities=profile.capabilities,
            bench=bench is not None,
            clock=self.clock,
            default_plan=options.plan,
            profile=profile.name,
            time_scale=options.time_scale,
            thresholds=options.thresholds,
        )
        self.engine.instrument_connected = False
        self.engine.instrument_message = "connecting to the electrometer"
        loop = asyncio.get_running_loop()

        def post(kind: str, payload: Any) -> None:
            loop.call_soon_threadsafe(self._events.put_nowait, (kind, payload))

        self.link = InstrumentLink(
            electrometer,
            post,
            bench=bench,
            clock=self.clock,
            flush=self._commit_traffic,
            line_of=lambda: self._latest_received,
            lines_read=self._take_lines_read,
        )

    def _record_traffic(self, direction: TrafficDirection, t_s: float, raw: bytes) -> None:
        """Keep one raw line, stamped now, for the next commit (in the instrument thread only).

        The store writes kept lines before anything else it appends, so an operator's action
        committed while a line waits still comes after that line in the session's chain.
        """
        if self.store is None:
            return
        session_id = self.link.session_id if self.link is not None else None
        stamp = self.store.stamp()
        ref = None
        if direction == TrafficDirection.RECEIVED:
            ref = self._latest_received = LineRef()
            self._lines_read.append((ref, 1))
        line = (session_id, t_s, stamp, _DIRECTION_TEXT[direction], bytes(raw))
        self.store.keep_traffic(line, None if ref is None else ref.written)

    def _record_traffic_burst(
        self, direction: TrafficDirection, t_s: float, lines: Sequence[bytes]
    ) -> None:
        """Keep raw lines that one read brought, stamped now, for the next commit, as
        :meth:`_record_traffic` keeps one (in the instrument thread only)."""
        if self.store is None:
            return
        session_id = self.link.session_id if self.link is not None else None
        ref = None
        if direction == TrafficDirection.RECEIVED:
            ref = self._latest_received = LineRef()
            self._lines_read.append((ref, len(lines)))
        self.store.keep_traffic_burst(
            session_id,
            t_s,
            self.store.stamp(),
            _DIRECTION_TEXT[direction],
            lines,
            None if ref is None else ref.written,
        )

    def _take_lines_read(self) -> list[tuple[LineRef, int]]:
        """Return the LineRefs of the lines received since the last call, and forget them
        (instrument thread only)."""
        read, self._lines_read = self._lines_read, []
        return read

    def _commit_traffic(self) -> bool:
        """Commit the raw lines kept so far in one transaction (committer thread only); return
        False when the record cannot commit: the store keeps the lines, in order, for the next try
        (they go first in whatever commits next, so the chain keeps the order things happened).
        """
        if self.store is None or not self.store.kept_traffic_count():
            return True
        now_s = time.monotonic()
        if self._lines_failing_since is not None and now_s - self._lines_tried_at < RETRY_S:
            self._tell_held_lines()
            return False
        try:
            # never wait long for another writer: the lines are kept, and the port goes on
            # being read while they wait
            with self.store.busy_timeout(LINES_WAIT_MS):
                committed = self.store.commit_traffic()
        except Exception as error:  # a traffic record must never stop the instrument thread
            cause = commit_failure(error)
            if cause is None:
                log.exception("could not record the raw instrument lines kept so far")
                return True
            self._lines_not_committed(cause, now_s)
            return False
        if self._lines_failing_since is not None:
            if self._lines_fault is not None:
                log.warning("the record is writable again; %d held raw lines committed", committed)
            self._lines_fault = self._lines_failing_since = None
            self._tell_held_lines()
        return True

    def _lines_not_committed(self, cause: str, now_s: float) -> None:
        """Note a failed commit of raw lines; declare the record not writable at once, or, for
        another program's write lock, once it has been held longer than the busy timeout."""
        assert self.store is not None
        self._lines_tried_at = now_s
        if self._lines_failing_since is None:
            self._lines_failing_since = now_s
        waited_s = now_s - self._lines_failing_since
        if cause == LOCKED and waited_s * 1000 < BUSY_TIMEOUT_MS:
            return  # a writer's ordinary transaction: the lines wait in memory meanwhile
        if cause != self._lines_fault:
            held = self.store.kept_traffic_count()
            log.error("%s; %d raw lines held in memory", not_writable(cause), held)
        self._lines_fault = cause
        self._tell_held_lines()

    def _tell_held_lines(self) -> None:
        """Tell the loop why lines are held and how many (committer thread only)."""
        assert self.store is not None
        held = self.store.kept_traffic_count() if self._lines_fault is not None else 0
        told = (self._lines_fault, held * 20 // MAX_HELD_LINES)  # in steps of 5 % of the bound
        now_s = time.monotonic()
        fresh = told != self._lines_told or now_s - self._lines_told_at >= RETRY_S
        if self.link is None or not fresh:
            return
        self._lines_told, self._lines_told_at = told, now_s
        self.link.backlog_full = held >= MAX_HELD_LINES
        self.link.post("record", (self._lines_fault, held))

    async def run(self, ready: Callable[[dict[str, Any]], None] | None = None) -> None:
        """Serve until :meth:`shutdown`; call ``ready(info)`` once the socket listens."""
        try:
            self._build()
            self._record_start()
        except BaseException as error:
            if self.store is not None:
                self.store.close()
            self.station_lock.release()
            # a refused socket folder or port is said as it is; SQLite's refusals in words
            cause = None if isinstance(error, OSError) else commit_failure(error)
            if cause is None:
                raise
            raise StoreError(
                f"the station database {self.options.db_path} could not be written as the "
                f"daemon started ({cause}): clear that (close the other program, free space), "
                "then start the daemon again; nothing recorded is lost, and raw lines a stop "
                "set aside stay beside the database until a start records them"
            ) from None
        assert self.engine is not None and self.link is not None and self.store is not None
        resumed = self.engine.apply(inputs.Restart()) is True
        info_visit = self.visit_desk().visit_id
        self.link.session_id = self._line_session = self.engine.session_id
        await self.server.start()
        try:
            await self.watch_server.start()
        except BaseException:
            await self.server.close()  # leave no control socket behind a refused start
            raise
        self.link.start()
        info = {
            "socket": str(self.options.socket_path),
            "watch_socket": str(self.options.watch_socket_path),
            "db": str(self.options.db_path),
            "pid": os.getpid(),
            "profile": self.engine.profile,
            "resumed_session": self.engine.session_id if resumed else None,
            "resumed_visit": info_visit,
        }
        if ready is not None:
            ready(info)
        tasks = [
            asyncio.create_task(self._consume_instrument(), name="instrument-events"),
            asyncio.create_task(self._tick(), name="ticker"),
            asyncio.create_task(self._refresh_results(), name="stored-results"),
        ]
        watchdog_s = sd_notify.watchdog_interval_s()
        if watchdog_s is not None:
            tasks.append(asyncio.create_task(self._watchdog(watchdog_s), name="watchdog"))
        try:
            await self._stopping.wait()
        finally:
            if self._results_timer is not None:
                self._results_timer.cancel()
            if self._results_task is not None:
                tasks.append(self._results_task)
            for task in tasks:
                task.cancel()
            await asyncio.gather(*tasks, return_exceptions=True)
            await self.server.close()
            await self.watch_server.close()
            self.link.stop()
            await asyncio.to_thread(self.link.join, STOP_COMMIT_S + 2.0)
            if self.options.bench_control and self.link.bench is not None:
                self.link.bench.close()
            if self._stopping.is_set():
                self._record_stop()
            self._set_aside_held_lines()
            self.store.close()
            self.station_lock.release()

    def shutdown(self, reason: str = "asked to stop") -> None:
        """Ask :meth:`run` to end (from a signal handler or a test); ``reason`` is recorded in
        the ``daemon_stopped`` event (``SIGTERM``, ``SIGINT``)."""
        self._stop_reason = reason
        if not self._stopping.is_set():
            sd_notify.notify(sd_notify.STOPPING)
        self._stopping.set()

    async def _watchdog(self, interval_s: float) -> None:
        """Tell the service manager the loop is alive every ``interval_s`` (half its limit):
        sent from the loop that serves the sockets and the engine, so a stuck loop goes quiet
        and the manager restarts the daemon."""
        while True:
            sd_notify.notify(sd_notify.WATCHDOG)
            await asyncio.sleep(interval_s)

    def _record_start(self) -> None:
        """Record ``daemon_started`` (a new file) or ``daemon_restarted``, saying whether the
        previous run stopped cleanly (its ``daemon_stopped`` is the last word) or crashed."""
        assert self.store is not None
        session = self.store.open_session()
        session_id = session.id if session else None
        last = self.store.last_event_of(LIFECYCLE_EVENTS)
        if last is None:
            started = ev.DaemonStarted(pid=os.getpid())
            self.store.add_event(session_id, DAEMON_ACTOR, EventKind.DAEMON_STARTED, started)
            return
        clean = last.kind == EventKind.DAEMON_STOPPED
        previous_pid = last.detail().get("pid")
        previous_run, previous_stop = "crashed", None
        if clean:
            previous_run, previous_stop = "stopped cleanly", last.detail().get("reason")
        elif previous_pid in self._set_aside_by:  # it stopped, with its lines set aside
            previous_run = STOPPED_LINES_SET_ASIDE
            previous_stop = self._set_aside_by[previous_pid]
        restarted = ev.DaemonRestarted(
            pid=os.getpid(),
            previous_run=previous_run,
            previous_stop=previous_stop,
            previous_pid=previous_pid,
        )
        self.store.add_event(session_id, DAEMON_ACTOR, EventKind.DAEMON_RESTARTED, restarted)

    def _record_stop(self) -> None:
        """Record ``daemon_stopped`` with its reason, in the open session if there is one (with
        the raw lines still held: if the instrument thread could not commit them in
        STOP_COMMIT_S, it waits no longer than a commit of lines does)."""
        assert self.store is not None and self.engine is not None
        detail = ev.DaemonStopped(pid=os.getpid(), reason=self._stop_reason)
        wait_ms = LINES_WAIT_MS if self.store.kept_traffic_count() else BUSY_TIMEOUT_MS
        try:
            session_id = self.engine.session_id
            with self.store.busy_timeout(wait_ms):
                self.store.add_event(session_id, DAEMON_ACTOR, EventKind.DAEMON_STOPPED, detail)
        except Exception as error:  # the stop goes on; the next start says the run crashed, or,
            # with its raw lines set aside, that it stopped so
            cause = self._stop_cause = commit_failure(error)
            if cause is None:
                log.exception("could not record the daemon's stop")
            else:
                log.error("could not record the daemon's stop: %s", not_writable(cause))

    def _set_aside_held_lines(self) -> None:
        """Write the raw lines the record could not commit by the stop to a side file beside
        the database (``record.unrecorded``), and say how many and where (:attr:`stop_problem`,
        logged); the next start records them. If the file cannot be written either, say that
        they are lost, and why."""
        assert self.store is not None
        lines = self.store.take_kept_traffic()
        if not lines:
            return
        cause = self._lines_fault or self._stop_cause or "the record could not commit"
        count = unrecorded.raw_lines(len(lines))
        reason = self._stop_reason if self._stopping.is_set() else "an unexpected error"
        try:
            path = unrecorded.set_aside(
                self.options.db_path,
                lines,
                reason=reason,
                cause=cause,
                station_uuid=self._station_uuid,
                session_uuids=self._session_uuids(lines),
            )
        except OSError as error:
            self.stop_problem = (
                f"{count} exchanged with the electrometer could not be recorded ({cause}) nor "
                f"written beside the database ({error}): they are lost"
            )
        else:
            self.set_aside_in = path
            self.stop_problem = (
                f"{count} exchanged with the electrometer could not be recorded at the stop "
                f"({cause}); they are set aside in {path}, and the next daemon start on "
                f"{self.options.db_path} records them"
            )
        log.error("%s", self.stop_problem)

    def _session_uuids(self, lines: Sequence[TrafficLine]) -> dict[int, str]:
        """Return the uuid of each session ``lines`` belong to, as the record holds them (none
        when it cannot be read either: the lines are then set aside without them)."""
        assert self.store is not None
        ids = {line[0] for line in lines if line[0] is not None}
        try:
            sessions = self.store.sessions_of(ids)
            return {session.id: session.uuid for session in sessions if session.uuid is not None}
        except Exception as error:  # the lines matter more than their sessions' uuids
            log.warning("the sessions of the raw lines set aside could not be read: %s", error)
            return {}

    def _record_set_aside(self) -> None:
        """Record the raw lines a previous run set aside at its stop, file by file (at the
        start, before anything else is written); a file that cannot be read as one is refused
        (UnrecordedFileError naming it and the line) and left in place."""
        assert self.store is not None
        for path in unrecorded.side_files(self.options.db_path):
            count, found = unrecorded.recover(self.store, path)
            self._set_aside_by[found.pid] = found.stopped_by
            lines = unrecorded.raw_lines(len(found.lines))
            done = f"recorded {lines}" if count else f"found already recorded the {lines}"
            log.warning(
                "%s read before the last stop, from %s (renamed *%s)",
                done,
                path,
                unrecorded.RECOVERED_SUFFIX,
            )

    # -- the loop's work -----------------------------------------------------------------------
    async def _consume_instrument(self) -> None:
        while True:
            kind, payload = await self._events.get()
            try:
                if kind == "record":
                    self._lines_not_writable(*payload)
                else:
                    self._held_events.append((kind, payload))
                    self._take_held_events()
                await self.after_change(streaming=True)
            except Exception:  # supervised: log it, record it, keep taking the instrument's news
                self._unexpected(f"handling the instrument's {kind!r}")

    # -- a record that cannot commit -------------------------------------------------------------
    def _lines_not_writable(self, cause: str | None, held: int) -> None:
        """Take the instrument thread's news: raw lines cannot be committed (``cause``), or can
        again (None); ``held``: how many are waiting in memory."""
        self._held_lines = held
        self._set_fault("lines", cause)

    def _set_fault(self, part: str, cause: str | None) -> None:
        """Note (or clear, None) why ``part`` of the record cannot commit; tell the operator."""
        if cause is None:
            self._faults.pop(part, None)
        else:
            self._faults[part] = cause
        assert self.engine is not None
        if not self._faults:
            self.engine.set_record_fault(None)
            return
        message = not_writable("; ".join(dict.fromkeys(self._faults.values())))
        if self._held_lines:
            plural = "s" if self._held_lines != 1 else ""
            message += f" ({self._held_lines:,} raw line{plural} held in memory"
            if self._held_lines >= HELD_WARNING_SHARE * MAX_HELD_LINES:
                message += f"; at {MAX_HELD_LINES:,} the electrometer is no longer read"
            message += ")"
        self.engine.set_record_fault(message)

    def _take_held_events(self) -> None:
        """Give the engine the instrument's news in order; stop at one that cannot be committed
        (it stays first in line, and is tried again)."""
        self._events_tried_at = time.monotonic()
        while self._held_events:
            kind, payload = self._held_events[0]
            try:
                self._take_instrument_event(kind, payload)
            except Exception as error:
                cause = commit_failure(error)
                if cause is None:
                    self._held_events.popleft()
                    raise
                if cause != self._faults.get("engine"):
                    log.error("%s; the instrument's %r is held", not_writable(cause), kind)
                self._set_fault("engine", cause)
                return
            self._held_events.popleft()
        if "engine" in self._faults:
            log.warning("the record is writable again; held readings recorded")
            self._set_fault("engine", None)

    def _check_record(self) -> None:
        """Try held news again, and check that the database files are the ones opened."""
        assert self.store is not None
        now_s = time.monotonic()
        if self._held_events and now_s - self._events_tried_at >= RETRY_S:
            self._take_held_events()
        if self._files is None or now_s - self._files_checked_at < FILES_CHECK_S:
            return
        self._files_checked_at = now_s
        changed = self._files.check()
        if changed is None:
            return
        self.store.checkpoint()  # keep what the deleted -wal file holds: copy it into the file
        if "files" not in self._faults:
            log.error("%s", not_writable(changed))
            self._set_fault(
                "files",
                f"{changed}; what was recorded is copied into the database file; stop the "
                "daemon and start it again to go on (the session resumes)",
            )

    def _take_instrument_event(self, kind: str, payload: Any) -> None:
        assert self.engine is not None
        engine = self.engine
        if kind == "samples":
            self._feed(*payload)
            return
        if kind == "reply_note":
            engine.set_reply_note(payload)
            return
        with engine.all_or_nothing():
            self._take_instrument_news(kind, payload)

    def _take_instrument_news(self, kind: str, payload: Any) -> None:
        engine = self.engine
        assert engine is not None
        if kind == "connected":
            engine.apply(inputs.InstrumentBack(identity=payload))
        elif kind == "lost":
            engine.apply(inputs.InstrumentLost(message=payload))
        elif kind == "fault":
            engine.apply(inputs.InstrumentLost(message=payload, still_connected=True))
        elif kind == "bench_refused":
            engine.apply(inputs.BenchRefused(message=payload))
        elif kind == "unreachable":
            engine.instrument_unreachable(payload)

    def _feed(self, generation: int | None, chunks: list[SampleChunk]) -> None:
        """Give the engine the samples of the arming now read, until one ends it: a capture
        ends it, except on an auto-reset instrument, whose next reading takes the samples
        that follow (see :attr:`Engine.sampling_run`)."""
        assert self.engine is not None
        engine = self.engine
        clock = engine.clock
        while chunks:
            if generation != self._generation or engine.sampling_run != self._sampled_run:
                return  # the rest belong to an arming already ended
            samples, ref, places = chunks[0]
            try:
                taken = engine.take_samples(samples, _line_ids(samples, ref, places), clock())
            except Exception:
                if engine.samples_taken:  # those were taken; the rest are tried again
                    chunks[0] = _rest(chunks[0], engine.samples_taken)
                raise
            if 0 < taken < len(samples):
                chunks[0] = _rest(chunks[0], taken)  # the next reading's, if the arming runs on
            else:
                del chunks[0]

    async def _tick(self) -> None:
        assert self.engine is not None
        while True:
            await asyncio.sleep(TICK_S)
            try:
                self._check_record()
                if not self._faults:
                    self.engine.apply(inputs.Tick())
                await self.after_change(streaming=True)
            except Exception:  # supervised, as the instrument events are
                self._unexpected("the clock tick")

    async def _refresh_results(self) -> None:
        """Keep the stored result of every closed session current: those recorded before the
        record kept results, or computed by another version of the evaluation, are evaluated
        again and stored, one at a time between the loop's other work (until then, history
        evaluates them live: never a stale result shown as current)."""
        assert self.store is not None
        try:
            while stored_result.refresh_some(self.store, 1):
                await asyncio.sleep(REFRESH_PAUSE_S)
        except Exception:  # supervised: the results stay live until the next start
            self._unexpected("refreshing the stored session results")

    def _unexpected(self, doing: str) -> None:
        """Log an unexpected error with its traceback and record it as an event; carry on."""
        log.exception("unexpected error while %s; the daemon carries on", doing)
        if self.store is None or self.engine is None:
            return
        with contextlib.suppress(Exception):
            error = traceback.format_exc(limit=8)
            failed: ev.DaemonError = {"while": doing, "error": error}
            self.store.add_event(
                self.engine.session_id, DAEMON_ACTOR, EventKind.DAEMON_ERROR, failed
            )

    async def after_change(self, *, streaming: bool = False) -> None:
        """Send the engine's commands to the instrument and publish what changed;
        ``streaming``: the change came from the instrument or the clock, not from a request
        (the results may then follow in a later delta, see :data:`RESULTS_INTERVAL_S`)."""
        assert self.engine is not None and self.link is not None
        engine = self.engine
        if engine.session_id != self._line_session:  # a session began or was left
            self._line_session = engine.session_id
            self.link.lines_for(engine.session_id)
        for command in engine.take_commands():
            self.link.send(command)
        if engine.sampling_run != self._sampled_run:
            self._sampled_run = engine.sampling_run
            self._generation += 1
            self.link.sample_for(self._generation if engine.reading is not None else None)
        reading = engine.reading
        if reading is not None and engine.seq == self._published_seq:
            last_at, last_charge = self._last_live
            now = self.clock()
            if reading.last_charge_nC != last_charge and now - last_at >= LIVE_INTERVAL_S:
                self._last_live = (now, reading.last_charge_nC)
                engine.touch_live()
        await self.publish(streaming=streaming)

    async def publish(self, *, streaming: bool = False) -> None:
        """Broadcast the audit events committed since the last call (as the store handed them
        over: nothing is read back) and, if the state changed, the snapshot. ``streaming``:
        while readings stream, a reading is sent with the results (and its set's statistics)
        computed last, and those follow in a delta of their own (:meth:`_results_later`)."""
        assert self.engine is not None and self.store is not None
        engine = self.engine
        servers = (self.server, self.watch_server)
        heard = any(server.has_subscribers() for server in servers)
        # the events and the change, in order, in one write to each subscriber
        lines = [_event_line(event) for event in self._emitted] if heard else []
        self._emitted.clear()  # the same list: the store extends it
        later = False
        if engine.seq != self._published_seq:
            self._published_seq = engine.seq
            if not heard:  # nothing to build
                self._sent = None
            else:
                later = streaming and engine.state in STREAMING_STATES and engine.results_stale
                line = self._change_line(self._current_snapshot(results_later=later))
                if line is not None:
                    lines.append(line)
        if lines:
            sent = b"".join(lines)
            for server in servers:
                server.queue_for_subscribers(sent)
        if later:
            self._results_later()

    def _results_later(self) -> None:
        """Compute and send the results readings left behind, once, as soon as
        :data:`RESULTS_INTERVAL_S` has passed since they were last computed (at once if it
        has: after the readings' own delta, which is on its way already)."""
        if self._results_timer is not None or self._results_task is not None:
            return  # already due: it will show every reading taken until then
        delay_s = max(0.0, self._results_at + RESULTS_INTERVAL_S - time.monotonic())
        self._results_timer = asyncio.get_running_loop().call_later(delay_s, self._results_due)

    def _results_due(self) -> None:
        self._results_timer = None
        self._results_task = asyncio.create_task(self._send_results(), name="results")

    async def _send_results(self) -> None:
        """Send the results of what is recorded now, if readings left them behind; after the
        change being published now, if one is (its reading goes out first, alone). Readings
        taken meanwhile get theirs in turn."""
        engine = self.engine
        assert engine is not None
        try:
            if engine.seq == self._published_seq and engine.results_stale:
                engine.touch_live()  # a new snapshot: the same state, its results now
                await self.publish()
        except Exception:  # supervised, as the instrument events are
            self._unexpected("sending the results")
        finally:
            self._results_task = None
            if engine.results_stale and self._sent is not None:
                self._results_later()

    def _change_line(self, snapshot: protocol.Snapshot) -> bytes | None:
        """Return the notification that brings every subscriber to ``snapshot``: a ``delta``
        from the one they hold, or (none held, or a delta too long) the whole snapshot."""
        base, self._sent = self._sent, snapshot
        if base is not None:
            with contextlib.suppress(ValueError):  # too long: the whole snapshot, trimmed
                delta = protocol.snapshot_delta(base, snapshot)
                return protocol.encode_from_daemon(
                    protocol.notification(protocol.NOTIFY_DELTA, delta)
                )
        fitted = _fitted(snapshot)
        self._sent = fitted
        try:
            return _snapshot_notification(fitted)
        except ValueError as error:
            log.error("a snapshot was not sent: %s", error)
            return None

    def snapshot(self) -> protocol.Snapshot:
        """Return the engine's snapshot now (the one built last, if nothing changed since),
        trimmed to fit one message if it must be."""
        return _fitted(self._current_snapshot())

    def _subscriber_snapshot(self) -> protocol.Snapshot:
        """Return the snapshot a new subscriber starts from: the one the other subscribers
        hold (the next delta's base), or, with none, the snapshot now, which becomes it."""
        if self._sent is None:
            assert self.engine is not None
            self._published_seq = self.engine.seq
            self._sent = _fitted(self._current_snapshot())
        return self._sent

    def _current_snapshot(self, *, results_later: bool = False) -> protocol.Snapshot:
        """Return the engine's snapshot at ``engine.seq``, built once per change: an action's
        reply is the snapshot its change was published with. ``results_later``: show the
        results computed last (when there are any) instead of computing them now."""
        assert self.engine is not None
        built = self._built
        if built is not None and built[0] == self.engine.seq:
            return built[1]
        seq = self.engine.seq
        shown = self.engine.last_results if results_later else None
        if shown is None:
            self._results_at = time.monotonic()
        snapshot = self.engine.snapshot(shown)
        snapshot["visit"] = self.visit_desk().snapshot()
        snapshot["plans"] = self.visit_desk().plan_choices()
        self._built = (seq, snapshot)
        return snapshot

    # -- requests ------------------------------------------------------------------------------
    async def dispatch(self, connection: Connection, method: str, params: dict[str, Any]) -> Any:
        """Carry out one request from ``connection`` and return its result."""
        assert self.engine is not None and self.store is not None
        if method == protocol.Method.HELLO:
            connection.client = params.get("client") or connection.client
            connection.operator = params.get("operator")
            return {
                "protocol_version": protocol.PROTOCOL_VERSION,
                "daemon_pid": os.getpid(),
                "socket": str(self.options.socket_path),
                "watch_only": connection.watch_only,
                "state": self.engine.state.value,
            }
        if method == protocol.Method.SUBSCRIBE:
            connection.subscribed = True
            return self._subscriber_snapshot()
        if method == protocol.Method.UNSUBSCRIBE:
            connection.subscribed = False
            return {}
        if method == protocol.Method.STATUS:
            return self.snapshot()
        if method == protocol.Method.SESSION_REVIEW:
            return self._review(connection, params)
        if method == protocol.Method.VISIT_REVIEW:
            review = self._review_visit(connection, params)
            await self.after_change()
            return review
        if method == protocol.Method.ENVIRONMENT_READ:
            if not await self._read_sensor(connection, required=True):
                raise IllegalTransition(method, self.engine.state, self.engine.allowed(), "")
            return self.snapshot()
        if method == protocol.Method.STEP_ARM:
            await self._read_sensor(connection, required=False)  # the air before each set
        if method in REGISTER_METHODS:
            self._same_station(params)
            with self.store.on_behalf_of(connection.account):
                handler = REGISTER_METHODS[method]
                return handler(self.store, params, connection.actor, self.engine.default_thresholds)
        try:
            with self.store.on_behalf_of(connection.account), self.engine.all_or_nothing():
                self._perform(method, params, connection.actor)
        except Exception as error:
            cause = commit_failure(error)
            if cause is None:
                raise
            why = f"{not_writable(cause)}; nothing was done"
            raise IllegalTransition(method, self.engine.state, [], why) from error
        finally:
            await self.after_change()  # a refused request may still have recorded something
        if method == protocol.Method.SESSION_START:
            await self._read_sensor(connection, required=False)  # the air the session starts in
        return self.snapshot()  # the one the subscribers were brought to

    async def _read_sensor(self, connection: Connection, *, required: bool) -> bool:
        """Record an air entry read from the environment sensor, when one is configured and
        the session takes one now; return True if one was recorded. A sensor that cannot be
        read is logged (and raised when ``required``): the operator can still type the air."""
        from chargebook.acquire.session.register_rows import sensor_entry
        from chargebook.drivers_generic.sensor import open_sensor

        assert self.engine is not None and self.store is not None
        port = self.options.sensor_port
        if port is None:
            if required:
                allowed = "a daemon started with serve --sensor-port DEVICE"
                raise InputError("sensor", None, allowed, "is missing")
            return False
        if protocol.Method.ENVIRONMENT_SET not in self.engine.allowed():
            return False

        def read() -> Any:
            with open_sensor(self.options.sensor_profile, port=port) as sensor:
                return sensor.read()

        try:
            reading = await asyncio.to_thread(read)
        except (InstrumentError, OSError) as error:
            log.warning("the environment sensor on %s cannot be read: %s", port, error)
            if required:
                raise
            return False
        if reading.temperature_C is None or reading.pressure_kPa is None:
            raise InputError("sensor", reading.written, "a temperature and a pressure", "lacks one")
        entry = sensor_entry(
            self.store,
            reading.serial,
            self.options.sensor_profile,
            reading.temperature_C,
            reading.pressure_kPa,
            reading.written,
        )
        try:
            with self.store.on_behalf_of(connection.account), self.engine.all_or_nothing():
                self.engine.set_environment(
                    entry.temperature_C, entry.pressure_kPa, "kPa", None, entry.source,
                    actor=DAEMON_ACTOR,
                )  # fmt: skip
        finally:
            await self.after_change()
        return True

    def _same_station(self, params: dict[str, Any]) -> None:
        """Refuse a request meant for another station file (its ``db``, when given)."""
        meant = params.get("db")
        if meant is not None and Path(meant).resolve() != self.options.db_path.resolve():
            raise InputError(
                "db", meant, f"the file this daemon keeps, {self.options.db_path}", "is another"
            )

    def _review(self, connection: Connection, params: dict[str, Any]) -> dict[str, Any]:
        """Record a review (``session.review``); the reviewer named in it is the actor."""
        from chargebook.acquire.record.review import record_review

        return self._reviewed(connection, record_review, params["session"], params)

    def _review_visit(self, connection: Connection, params: dict[str, Any]) -> dict[str, Any]:
        """Record a visit's review (``visit.review``); the reviewer named in it is the actor."""
        from chargebook.acquire.record.review import record_visit_review

        assert self.engine is not None
        review = self._reviewed(connection, record_visit_review, params["visit"], params)
        self.visit_desk().version += 1
        self.engine.touch_live()  # a new snapshot, showing the review
        return review

    def _reviewed(
        self, connection: Connection, record: Callable[..., Any], of: int, params: dict[str, Any]
    ) -> dict[str, Any]:
        """Record a review of ``of`` with ``record`` on behalf of the connection's account;
        refuse a review meant for another station file (``db``)."""
        assert self.store is not None
        self._same_station(params)
        with self.store.on_behalf_of(connection.account):
            review = record(
                self.store,
                of,
                params["decision"],
                params["reviewer"],
                params["comment"],
                allow_self_review=bool(params.get("allow_self_review", False)),
            )
        return review.to_dict()

    def visit_desk(self) -> VisitDesk:
        """Return the calibration visit kept beside the engine (made, and the visit left open
        by an earlier run taken up, on first use)."""
        assert self.engine is not None
        if self.visits is None or self.visits.engine is not self.engine:
            self.visits = VisitDesk(self.engine)
            self.visits.restore()
        return self.visits

    def _perform(self, method: str, params: dict[str, Any], actor: str) -> None:
        engine, desk = self.engine, self.visit_desk()
        assert engine is not None
        M = protocol.Method
        visit_actions: dict[str, Callable[[], Any]] = {
            M.VISIT_START: lambda: desk.start(params["machine"], params["metadata"], actor),
            M.VISIT_ADD_BEAM: lambda: desk.add_beam(
                params["metadata"], params.get("plan"), actor, params.get("register_ids")
            ),
            M.VISIT_START_BEAM: lambda: desk.start_beam(
                params["beam"], actor, params.get("mu_per_reading")
            ),
            M.VISIT_SKIP_BEAM: lambda: desk.skip_beam(params["beam"], params["reason"], actor),
            M.VISIT_CONFIRM_AIR: lambda: desk.confirm_air(actor),
            M.VISIT_CLOSE: lambda: desk.close(params.get("reason"), actor),
        }
        if method in visit_actions:
            visit_actions[method]()  # a beam's session starts through the engine's input
        else:
            engine.apply(inputs.from_request(method, params, actor))
