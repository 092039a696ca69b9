"""An asyncio client of the chargebook daemon (JSON-RPC 2.0 over its Unix socket).

Light on purpose: standard library and :mod:`chargebook.acquire.protocol` only, so the console
and scripts can use it without pulling in the store or the drivers.

    client = await DaemonClient.connect(socket_path, client="console", operator="operator C")
    snapshot = await client.subscribe()          # notifications start now
    await client.call("environment.set", temperature_C=21.4, pressure=101.2)
    async for note in client.notifications():    # Notification(method, params)
        if note.method == "snapshot": ...
    await client.close()

The daemon sends what changed (``delta`` notifications); the client applies each to the
snapshot it holds and passes the result on as a ``snapshot`` notification whose unchanged parts
are the very objects of the one before (so a console can redraw only what changed). A missed
delta makes it ask for the whole snapshot (``status``) and go on from that.

``call`` raises :class:`DaemonError` (with ``code``, ``message``, ``data`` and ``field``) when the
daemon answers with an error, and :class:`ConnectionLost` when the socket goes away; pending
calls then fail and :meth:`DaemonClient.notifications` ends. :func:`connect_with_retry` waits
for a daemon that is starting or restarting.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import json
import logging
import os
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from chargebook.acquire import protocol

log = logging.getLogger(__name__)


class DaemonError(Exception):
    """The daemon answered a request with a JSON-RPC error."""

    def __init__(self, code: int, message: str, data: Any = None) -> None:
        super().__init__(message)
        self.code = code
        self.message = message
        self.data = data

    @property
    def field(self) -> str | None:
        """Return the name of the parameter the error is about, when the daemon said."""
        if isinstance(self.data, dict):
            value = self.data.get("field")
            return value if isinstance(value, str) else None
        return None

    def __str__(self) -> str:
        name = protocol.ERROR_NAMES.get(self.code, str(self.code))
        return f"{self.message} ({name})"


class UntrustedSocket(PermissionError):
    """The socket's directory, or the process answering on it, is not this user's own."""


def check_socket_directory(socket_path: Path) -> int:
    """Return the uid of the account a daemon on ``socket_path`` may run as: this user, or the
    owner of a socket group's directory this user belongs to (see
    :func:`protocol.socket_directory_problem`). Raise :class:`UntrustedSocket` for any other.

    A missing directory is left to the connection attempt (FileNotFoundError: no daemon).
    """
    directory = socket_path.parent
    if not (directory.exists() or directory.is_symlink()):
        return os.getuid()
    problem = protocol.socket_directory_problem(directory, client=True)
    if problem is not None:
        raise UntrustedSocket(f"not talking to a daemon through {socket_path}: {problem}")
    return directory.lstat().st_uid


def check_peer_is_this_user(
    writer: asyncio.StreamWriter, socket_path: str, owner_uid: int | None = None
) -> None:
    """Raise :class:`UntrustedSocket` unless the process on the socket runs as this user or as
    ``owner_uid`` (the owner of the socket group's directory)."""
    import socket
    import struct

    sock = writer.get_extra_info("socket")
    if sock is None or not hasattr(socket, "SO_PEERCRED"):
        return  # no peer credentials on this platform: the directory check stands alone
    credentials = sock.getsockopt(socket.SOL_SOCKET, socket.SO_PEERCRED, struct.calcsize("3i"))
    pid, uid, _gid = struct.unpack("3i", credentials)
    if uid not in (os.getuid(), owner_uid):
        owner = "" if owner_uid in (None, os.getuid()) else " nor as its directory's owner"
        raise UntrustedSocket(
            f"not talking to the process on {socket_path}: it runs as uid {uid} (pid {pid}), "
            f"not as this user (uid {os.getuid()}){owner}"
        )


class ConnectionLost(ConnectionError):
    """The connection to the daemon closed (the daemon stopped, or closed this connection)."""


@dataclass(frozen=True, slots=True)
class Notification:
    """A message the daemon sent without being asked: ``snapshot`` or ``event``."""

    method: str
    params: Any


NotificationCallback = Callable[[Notification], None]

_END = Notification("", None)  # sentinel put on the queue when the connection ends


class DaemonClient:
    """One connection to the daemon. Create it with :meth:`connect`."""

    def __init__(
        self,
        reader: asyncio.StreamReader,
        writer: asyncio.StreamWriter,
        socket_path: str,
        *,
        queue_size: int = 10_000,
    ) -> None:
        self.socket_path = socket_path
        self._reader = reader
        self._writer = writer
        self._ids = itertools.count(1)
        self._pending: dict[int, asyncio.Future[Any]] = {}
        self._queue: asyncio.Queue[Notification] = asyncio.Queue(maxsize=queue_size)
        self._callbacks: list[NotificationCallback] = []
        self._snapshot_changed = asyncio.Condition()
        self._write_lock = asyncio.Lock()
        self.latest_snapshot: dict[str, Any] | None = None
        #: The snapshot the daemon's next delta applies to (None: none yet, or one was missed).
        self._base: dict[str, Any] | None = None
        self._resync_id: int | None = None  # the status request that replaces a missed delta
        self._base_ids: set[int] = set()  # requests whose result becomes the base (subscribe)
        self.hello: dict[str, Any] | None = None
        self._closed = False
        self._reader_task = asyncio.create_task(self._read_loop(), name="daemon-client-reader")

    # -- opening and closing -------------------------------------------------------------------
    @classmethod
    async def connect(
        cls,
        socket_path: str | Path | None = None,
        *,
        client: str = "script",
        operator: str | None = None,
    ) -> DaemonClient:
        """Return a client connected to the daemon at ``socket_path`` that has said hello.

        ``socket_path`` defaults to :func:`protocol.default_socket_path`. Raises
        FileNotFoundError / ConnectionRefusedError when no daemon listens there.
        """
        path = str(socket_path or protocol.default_socket_path())
        owner_uid = check_socket_directory(Path(path))
        reader, writer = await asyncio.open_unix_connection(
            path, limit=protocol.MAX_DAEMON_MESSAGE_BYTES + 1
        )
        try:
            check_peer_is_this_user(writer, path, owner_uid)
        except UntrustedSocket:
            writer.close()
            raise
        self = cls(reader, writer, path)
        params: dict[str, Any] = {"client": client}
        if operator:
            params["operator"] = operator
        try:
            self.hello = await self.call(protocol.Method.HELLO, **params)
        except BaseException:
            await self.close()
            raise
        return self

    async def close(self) -> None:
        """Close the connection; pending calls fail with ConnectionLost."""
        if not self._closed:
            self._closed = True
            self._writer.close()
            with contextlib.suppress(Exception):
                await self._writer.wait_closed()
        if self._reader_task is not asyncio.current_task():
            self._reader_task.cancel()
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await self._reader_task
        self._finish(ConnectionLost("the client closed the connection"))

    async def __aenter__(self) -> DaemonClient:
        return self

    async def __aexit__(self, *exc_info: object) -> None:
        await self.close()

    @property
    def connected(self) -> bool:
        """Return True while the connection is open."""
        return not self._closed and not self._reader_task.done()

    # -- requests ------------------------------------------------------------------------------
    async def call(self, method: str, /, **params: Any) -> Any:
        """Send one request and return its result.

        Raises :class:`DaemonError` for an error response and :class:`ConnectionLost` if the
        connection closes first. ``None`` values are left out of the params.
        """
        return await self._request(method, params)

    async def _request(self, method: str, params: dict[str, Any], *, base: bool = False) -> Any:
        """Send one request and return its result; ``base``: the result is a whole snapshot
        that the deltas sent after it apply to, held as it is read (before any of them)."""
        if not self.connected:
            raise ConnectionLost("not connected to the daemon")
        request_id = next(self._ids)
        if base:
            self._base_ids.add(request_id)
        clean = {name: value for name, value in params.items() if value is not None}
        line = protocol.encode(protocol.request(request_id, str(method), clean))
        future: asyncio.Future[Any] = asyncio.get_running_loop().create_future()
        self._pending[request_id] = future
        try:
            await self.send_raw(line)
            return await future
        finally:
            self._pending.pop(request_id, None)
            self._base_ids.discard(request_id)

    async def send_raw(self, data: bytes) -> None:
        """Write bytes to the socket as they are (for tests of the daemon's robustness)."""
        async with self._write_lock:
            try:
                self._writer.write(data)
                await self._writer.drain()
            except (ConnectionError, RuntimeError) as error:
                raise ConnectionLost(f"lost the daemon while sending: {error}") from error

    async def subscribe(self) -> dict[str, Any]:
        """Start notifications and return the current snapshot (the base of the first delta)."""
        snapshot = await self._request(protocol.Method.SUBSCRIBE, {}, base=True)
        await self._remember_snapshot(snapshot)
        return snapshot

    async def status(self) -> dict[str, Any]:
        """Return the current snapshot."""
        return await self.call(protocol.Method.STATUS)

    # -- notifications -------------------------------------------------------------------------
    def add_listener(self, callback: NotificationCallback) -> None:
        """Call ``callback(notification)`` for every notification, in the reader task."""
        self._callbacks.append(callback)

    def remove_listener(self, callback: NotificationCallback) -> None:
        """Stop calling ``callback``."""
        with contextlib.suppress(ValueError):
            self._callbacks.remove(callback)

    async def notifications(self) -> AsyncIterator[Notification]:
        """Yield notifications in order until the connection closes."""
        while True:
            note = await self._queue.get()
            if note is _END:
                self._queue.put_nowait(_END)  # let other iterators end too
                return
            yield note

    async def wait_for_snapshot(
        self, predicate: Callable[[dict[str, Any]], bool], timeout_s: float = 30.0
    ) -> dict[str, Any]:
        """Return the first snapshot (the latest one included) for which ``predicate`` is true.

        Needs :meth:`subscribe` first. Raises TimeoutError after ``timeout_s`` seconds and
        ConnectionLost if the connection closes while waiting.
        """

        def ready() -> bool:
            return (self.latest_snapshot is not None and predicate(self.latest_snapshot)) or (
                not self.connected
            )

        async with asyncio.timeout(timeout_s), self._snapshot_changed:
            await self._snapshot_changed.wait_for(ready)
        if self.latest_snapshot is not None and predicate(self.latest_snapshot):
            return self.latest_snapshot
        raise ConnectionLost("the daemon connection closed while waiting for a snapshot")

    # -- internals -----------------------------------------------------------------------------
    async def _remember_snapshot(self, snapshot: dict[str, Any]) -> None:
        latest = self.latest_snapshot
        if latest is None or snapshot.get("seq", 0) >= latest.get("seq", 0):
            self.latest_snapshot = snapshot
        async with self._snapshot_changed:
            self._snapshot_changed.notify_all()

    async def _read_loop(self) -> None:
        reason: Exception = ConnectionLost("the daemon closed the connection")
        try:
            while True:
                try:
                    line = await self._reader.readline()
                except (ValueError, asyncio.LimitOverrunError) as error:
                    reason = ConnectionLost(f"the daemon sent an over-long message: {error}")
                    break
                if not line:
                    break
                await self._dispatch(line)
        except (ConnectionError, OSError) as error:
            reason = ConnectionLost(f"lost the daemon: {error}")
        finally:
            self._closed = True
            self._finish(reason)
            async with self._snapshot_changed:
                self._snapshot_changed.notify_all()

    async def _dispatch(self, line: bytes) -> None:
        try:
            message = json.loads(line)
        except ValueError:
            log.warning("ignoring a line from the daemon that is not JSON: %r", line[:200])
            return
        if not isinstance(message, dict):
            log.warning("ignoring a message from the daemon that is not an object")
            return
        if "method" in message and "id" not in message:
            sent = Notification(str(message["method"]), message.get("params"))
            note = self._applied(sent.params) if sent.method == protocol.NOTIFY_DELTA else sent
            if note is None:
                return
            if note.method == protocol.NOTIFY_SNAPSHOT and isinstance(note.params, dict):
                await self._take_snapshot(note.params)
                return
            self._pass_on(note)
            return
        if self._resync_id is not None and message.get("id") == self._resync_id:
            self._resync_id = None
            if isinstance(message.get("result"), dict):  # the whole snapshot, in its place
                await self._take_snapshot(message["result"])
            return
        if message.get("id") in self._base_ids and isinstance(message.get("result"), dict):
            self._base = message["result"]
        future = self._pending.get(message.get("id"))  # type: ignore[arg-type]
        if future is None or future.done():
            if message.get("id") is None and "error" in message:
                log.warning("the daemon reported an error: %s", message["error"])
            return
        if "error" in message:
            error = message["error"] or {}
            future.set_exception(
                DaemonError(
                    int(error.get("code", protocol.INTERNAL_ERROR)),
                    str(error.get("message", "unknown error")),
                    error.get("data"),
                )
            )
        else:
            future.set_result(message.get("result"))

    async def _take_snapshot(self, snapshot: dict[str, Any]) -> None:
        """Hold a whole snapshot (the next delta's base) and pass it on as a notification."""
        self._base = snapshot
        await self._remember_snapshot(snapshot)
        self._pass_on(Notification(protocol.NOTIFY_SNAPSHOT, snapshot))

    def _pass_on(self, note: Notification) -> None:
        """Give a notification to the iterators and the listeners."""
        self._enqueue(note)
        for callback in list(self._callbacks):
            try:
                callback(note)
            except Exception:
                log.exception("a notification listener failed")

    def _applied(self, delta: Any) -> Notification | None:
        """Return the ``snapshot`` notification a ``delta`` leads to from the snapshot held;
        None when it is not the delta's base (one was missed: the whole snapshot is asked for,
        and deltas are ignored until it comes) or already newer than the delta."""
        base = self._base
        if not isinstance(delta, dict) or self._resync_id is not None:
            return None
        if base is not None and delta.get("seq", 0) <= base.get("seq", 0):
            return None  # the snapshot held is already as new (a status reply overtook it)
        try:
            if base is None:
                raise protocol.DeltaGap("no snapshot to apply a delta to")
            return Notification(protocol.NOTIFY_SNAPSHOT, protocol.apply_delta(base, delta))
        except (protocol.DeltaGap, KeyError, TypeError) as error:
            log.info("asking the daemon for the whole snapshot: %s", error)
            self._resync()
            return None

    def _resync(self) -> None:
        """Ask for the whole snapshot; its reply replaces the one held (see :meth:`_dispatch`)."""
        request_id = next(self._ids)
        self._resync_id = request_id
        line = protocol.encode(protocol.request(request_id, str(protocol.Method.STATUS)))
        with contextlib.suppress(ConnectionError, RuntimeError):
            self._writer.write(line)

    def _enqueue(self, note: Notification) -> None:
        if self._queue.full():
            with contextlib.suppress(asyncio.QueueEmpty):
                self._queue.get_nowait()  # a client that never reads keeps the newest
        self._queue.put_nowait(note)

    def _finish(self, reason: Exception) -> None:
        for future in self._pending.values():
            if not future.done():
                future.set_exception(reason)
        self._pending.clear()
        if self._queue.full():
            with contextlib.suppress(asyncio.QueueEmpty):
                self._queue.get_nowait()
        with contextlib.suppress(asyncio.QueueFull):
            self._queue.put_nowait(_END)


async def connect_with_retry(
    socket_path: str | Path | None = None,
    *,
    attempts: int | None = None,
    backoff_s: float = 0.1,
    max_backoff_s: float = 2.0,
    client: str = "script",
    operator: str | None = None,
) -> DaemonClient:
    """Return a connected client, retrying with doubling backoff while no daemon answers.

    ``attempts=None`` retries forever (the console's reconnect loop); otherwise the last
    connection error is raised after ``attempts`` tries.
    """
    delay_s = backoff_s
    tries = 0
    while True:
        tries += 1
        try:
            return await DaemonClient.connect(socket_path, client=client, operator=operator)
        except (OSError, ConnectionLost) as error:
            if attempts is not None and tries >= attempts:
                raise
            log.debug("daemon not reachable (%s); retrying in %.2f s", error, delay_s)
            await asyncio.sleep(delay_s)
            delay_s = min(delay_s * 2, max_backoff_s)
