"""The JSON-RPC 2.0 server on the daemon's Unix socket (framing and errors in ``protocol``).

One asyncio server, several clients at once. Each connection is read line by line with a bound
on the line length; garbage, an over-long line, a slow reader or a vanished client affects only
its own connection: nothing sent to a client waits for that client to read. The socket lives
in a directory only its user can enter (0700) and is mode 0600, or, with a socket group, a
directory 0750 and a socket 0660 owned by that group; there is no TCP listener. A server may
answer only some methods (the watch-only socket) and refuses the others by name.

The server knows nothing of measurements: it calls ``dispatch(connection, method, params)``
and turns the exceptions it raises into error responses (:func:`error_for`).
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import os
import socket
import stat
from collections.abc import Awaitable, Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from chargebook.acquire import protocol
from chargebook.acquire.engine.states import IllegalTransition
from chargebook.corrections.errors import InputError
from chargebook.drivers_generic.interface import InstrumentError

log = logging.getLogger(__name__)

#: A subscriber whose unsent output grows beyond this many bytes is disconnected.
MAX_PENDING_OUTPUT_BYTES = 4 * 1024 * 1024
#: Connections the kernel queues before the server accepts them (asyncio's default of 100 let
#: 23 of 200 simultaneous connects fail with EAGAIN).
LISTEN_BACKLOG = 1024


class SocketInUse(RuntimeError):
    """Another daemon already answers on the socket path."""


class UnsafeSocketDirectory(RuntimeError):
    """The socket's directory is not private to this user (owner or mode)."""


@dataclass(eq=False)
class Connection:
    """One client: its writer, who it is, whether it wants notifications."""

    writer: asyncio.StreamWriter
    number: int
    client: str = "client"
    operator: str | None = None
    subscribed: bool = False
    closed: bool = False
    account: str | None = None  # the Unix account of the peer process (SO_PEERCRED)
    watch_only: bool = False  # came in on the watch-only socket: may not act

    @property
    def actor(self) -> str:
        """Return who is acting on this connection, for the audit log."""
        return self.operator or self.client

    async def send(self, line: bytes) -> None:
        """Queue one encoded message for this client (see :meth:`queue`)."""
        self.queue(line)

    def queue(self, line: bytes) -> None:
        """Queue encoded messages (one or more whole lines) for this client; never wait for
        the client to read them.

        The connection's outgoing queue is its transport's buffer, written out by the event
        loop as the client reads. A client that falls more than MAX_PENDING_OUTPUT_BYTES behind
        (a suspended console, a stalled script) is disconnected with a logged reason, so it can
        delay neither acquisition nor any other client.
        """
        if self.closed:
            return
        behind_bytes = self.writer.transport.get_write_buffer_size()
        if behind_bytes + len(line) > MAX_PENDING_OUTPUT_BYTES:
            log.warning(
                "client %d (%s) is %d bytes behind and not reading; closing its connection",
                self.number,
                self.actor,
                behind_bytes,
            )
            self.close()
            return
        try:
            self.writer.write(line)
        except (ConnectionError, RuntimeError):
            self.close()

    def close(self) -> None:
        if not self.closed:
            self.closed = True
            self.writer.close()


Dispatch = Callable[[Connection, str, dict[str, Any]], Awaitable[Any]]


def error_for(error: BaseException) -> tuple[int, str, Any]:
    """Return (code, message, data) of the JSON-RPC error for an exception from dispatch."""
    from chargebook.acquire.engine.engine import ConfirmationRequired

    if isinstance(error, protocol.ParamsError):
        return protocol.INVALID_PARAMS, str(error), error.data()
    if isinstance(error, IllegalTransition):
        data = {"state": error.state.value, "allowed": error.allowed, "action": error.action}
        return protocol.ILLEGAL_TRANSITION, str(error), data
    if isinstance(error, InputError):
        data = {"field": error.field, "value": _plain(error.value), "allowed": error.allowed}
        return protocol.INPUT_ERROR, str(error), data
    if isinstance(error, ConfirmationRequired):
        return protocol.CONFIRMATION_REQUIRED, str(error), {"field": "confirm", "value": False}
    if isinstance(error, InstrumentError):
        return protocol.INSTRUMENT_ERROR, f"the electrometer: {error}", None
    log.exception("internal error while handling a request", exc_info=error)
    return protocol.INTERNAL_ERROR, f"internal error: {type(error).__name__}: {error}", None


def _plain(value: Any) -> Any:
    try:
        json.dumps(value, allow_nan=False)
    except (TypeError, ValueError):
        return repr(value)
    return value


def peer_account(writer: asyncio.StreamWriter) -> str | None:
    """Return the Unix account of the process at the other end of a Unix socket: its user
    name, or ``uid N`` when the uid has no name; None where peer credentials are not given."""
    import pwd
    import struct

    sock = writer.get_extra_info("socket")
    if sock is None or not hasattr(socket, "SO_PEERCRED"):
        return None
    try:
        credentials = sock.getsockopt(socket.SOL_SOCKET, socket.SO_PEERCRED, struct.calcsize("3i"))
    except OSError:
        return None
    _pid, uid, _gid = struct.unpack("3i", credentials)
    try:
        return pwd.getpwuid(uid).pw_name
    except KeyError:
        return f"uid {uid}"


def group_id(name: str) -> int:
    """Return the id of the Unix group ``name``; UnsafeSocketDirectory if this user may not
    give files to it (no such group, or not one of this process's groups)."""
    import grp

    try:
        gid = grp.getgrnam(name).gr_gid
    except KeyError:
        raise UnsafeSocketDirectory(f"--socket-group {name}: no such group") from None
    if gid != os.getgid() and gid not in os.getgroups():
        raise UnsafeSocketDirectory(
            f"--socket-group {name}: this user (uid {os.getuid()}) is not a member of it"
        )
    return gid


def prepare_socket_dir(path: Path, gid: int | None = None) -> None:
    """Create the socket's directory with mode 0700 (0750 owned by group ``gid`` when given),
    or check that an existing one is as private as that.

    Raises UnsafeSocketDirectory when it is a symlink, belongs to someone else or others may
    enter it (:func:`protocol.socket_directory_problem`).
    """
    directory = path.parent
    if not directory.is_symlink():
        try:
            directory.mkdir(mode=0o700, parents=True, exist_ok=True)
        except OSError as error:
            raise UnsafeSocketDirectory(
                f"cannot create the socket's folder {directory}: {error.strerror}; choose --socket"
            ) from None
        if gid is not None and directory.lstat().st_uid == os.getuid():
            os.chown(directory, -1, gid)
            os.chmod(directory, 0o750)
    problem = protocol.socket_directory_problem(directory, gid)
    if problem is not None:
        raise UnsafeSocketDirectory(f"{problem}; choose --socket")


def remove_stale_socket(path: Path) -> None:
    """Remove a socket file nobody answers on; raise SocketInUse when a daemon answers."""
    if not path.exists() and not path.is_symlink():
        return
    if not stat.S_ISSOCK(path.lstat().st_mode):
        raise SocketInUse(f"{path} exists and is not a socket; choose another --socket")
    probe = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        probe.connect(str(path))
    except OSError:
        path.unlink()  # stale: left by a daemon that died
        return
    finally:
        probe.close()
    raise SocketInUse(f"a daemon is already listening on {path}")


class RpcServer:
    """Serves JSON-RPC 2.0 on a Unix socket; see the module docstring."""

    def __init__(
        self,
        socket_path: Path,
        dispatch: Dispatch,
        *,
        group: str | None = None,
        methods: frozenset[str] | None = None,
        refusal: str = protocol.WATCH_ONLY,
    ) -> None:
        """``group``: the Unix group that may use the socket (None: this user only);
        ``methods``: the only methods answered (None: all), others refused with ``refusal``."""
        self.socket_path = Path(socket_path)
        self.dispatch = dispatch
        self.group = group
        self.methods = methods
        self.refusal = refusal
        self.connections: set[Connection] = set()
        self._server: asyncio.base_events.Server | None = None
        self._numbers = 0

    def prepare_directory(self) -> int | None:
        """Create the socket's directory, or check an existing one (:func:`prepare_socket_dir`);
        return the group's id (None: this user only). Raises UnsafeSocketDirectory."""
        gid = group_id(self.group) if self.group else None
        prepare_socket_dir(self.socket_path, gid)
        return gid

    async def start(self) -> None:
        """Listen on the socket (private directory and mode 0600, or the group's 0750/0660)."""
        gid = self.prepare_directory()
        remove_stale_socket(self.socket_path)
        old_umask = os.umask(0o177)  # the socket file is born 0600
        try:
            self._server = await asyncio.start_unix_server(
                self._serve,
                path=str(self.socket_path),
                limit=protocol.MAX_MESSAGE_BYTES,
                backlog=LISTEN_BACKLOG,
            )
        finally:
            os.umask(old_umask)
        if gid is not None:
            os.chown(self.socket_path, -1, gid)
        os.chmod(self.socket_path, 0o600 if gid is None else 0o660)

    async def close(self) -> None:
        """Stop listening, close every connection and remove the socket file."""
        if self._server is not None:
            self._server.close()
        for connection in list(self.connections):
            connection.close()
        if self._server is not None:
            with contextlib.suppress(Exception):
                await asyncio.wait_for(self._server.wait_closed(), 2.0)
        with contextlib.suppress(FileNotFoundError):
            self.socket_path.unlink()

    async def broadcast(self, method: str, params: Any) -> None:
        """Send a notification to every subscribed connection."""
        await self.broadcast_line(
            protocol.encode_from_daemon(protocol.notification(method, params))
        )

    async def broadcast_line(self, line: bytes) -> None:
        """Send encoded notification lines (one or more whole lines) to every subscribed
        connection."""
        self.queue_for_subscribers(line)

    def queue_for_subscribers(self, line: bytes) -> None:
        """Queue encoded notification lines for every subscribed connection, in one write each
        (no task per connection: the write never waits, see :meth:`Connection.queue`)."""
        for connection in [c for c in self.connections if c.subscribed and not c.closed]:
            connection.queue(line)

    def has_subscribers(self) -> bool:
        """Return True when at least one open connection asked for notifications."""
        return any(c.subscribed and not c.closed for c in self.connections)

    async def _serve(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self._numbers += 1
        connection = Connection(
            writer,
            self._numbers,
            account=peer_account(writer),
            watch_only=self.methods is not None,
        )
        self.connections.add(connection)
        log.info("client %d connected", connection.number)
        try:
            while not connection.closed:
                try:
                    line = await reader.readuntil(b"\n")
                except asyncio.IncompleteReadError:
                    break  # the client went away (a partial last line is ignored)
                except asyncio.LimitOverrunError:
                    await self._reply_error(
                        connection,
                        None,
                        protocol.INVALID_REQUEST,
                        f"message longer than {protocol.MAX_MESSAGE_BYTES} bytes; "
                        "closing this connection",
                    )
                    break
                if line.strip():
                    await self._handle_line(connection, line)
        except (ConnectionError, OSError):
            pass
        finally:
            connection.close()
            self.connections.discard(connection)
            log.info("client %d disconnected", connection.number)

    async def _reply_error(
        self, connection: Connection, request_id: Any, code: int, message: str, data: Any = None
    ) -> None:
        await connection.send(
            protocol.encode_from_daemon(protocol.error_response(request_id, code, message, data))
        )

    async def _handle_line(self, connection: Connection, line: bytes) -> None:
        try:
            message = json.loads(line, parse_constant=_not_a_json_number)
        except (ValueError, UnicodeDecodeError, RecursionError) as error:  # nested too deep
            await self._reply_error(connection, None, protocol.PARSE_ERROR, f"not JSON: {error}")
            return
        request_id = message.get("id") if isinstance(message, dict) else None
        if not _usable_id(request_id):
            request_id = None  # JSON-RPC 2.0: an id that cannot be read is answered as null
        problem = _request_problem(message)
        if problem is not None:
            await self._reply_error(connection, request_id, protocol.INVALID_REQUEST, problem)
            return
        method = message["method"]
        is_notification = "id" not in message
        if method not in protocol.METHODS:
            if not is_notification:
                await self._reply_error(
                    connection, request_id, protocol.METHOD_NOT_FOUND, f"no method {method!r}"
                )
            return
        if self.methods is not None and method not in self.methods:
            if not is_notification:
                await self._reply_error(
                    connection,
                    request_id,
                    protocol.METHOD_NOT_FOUND,
                    f"{method} is refused: {self.refusal}",
                    {"method": method, "answered": sorted(self.methods)},
                )
            return
        try:
            params = protocol.validate_params(method, message.get("params"))
            result = await self.dispatch(connection, method, params)
            reply = protocol.result_response(request_id, result)
        except Exception as error:  # every failure becomes an error response
            code, text, data = error_for(error)
            reply = protocol.error_response(request_id, code, text, data)
        if not is_notification:
            await connection.send(_encoded_reply(reply, request_id))


def _encoded_reply(reply: dict[str, Any], request_id: Any) -> bytes:
    """Return the reply as one line, or an internal error if it cannot be sent as it is."""
    try:
        return protocol.encode_from_daemon(reply)
    except ValueError as error:  # over the size limit, or a value JSON cannot carry
        log.warning("a reply could not be encoded: %s", error)
        text = f"internal error: the reply could not be sent ({error})"
        return protocol.encode_from_daemon(
            protocol.error_response(request_id, protocol.INTERNAL_ERROR, text)
        )


def _not_a_json_number(name: str) -> Any:
    """Refuse NaN, Infinity and -Infinity, which Python reads but JSON does not have."""
    raise ValueError(f"{name} is not a JSON value")


def _usable_id(request_id: Any) -> bool:
    """Return True for an id a reply can carry: a string, a whole number or null."""
    return request_id is None or (
        isinstance(request_id, str | int) and not isinstance(request_id, bool)
    )


def _request_problem(message: Any) -> str | None:
    """Return what makes ``message`` not a JSON-RPC 2.0 request, or None."""
    if isinstance(message, list):
        return "batches are not supported: send one request per line"
    if not isinstance(message, dict):
        return "a request must be a JSON object"
    if message.get("jsonrpc") != protocol.JSONRPC:
        return 'a request must have "jsonrpc": "2.0"'
    if not isinstance(message.get("method"), str):
        return "a request must name its method as a string"
    if not _usable_id(message.get("id")):
        return "a request id must be a string, a number or null"
    return None
