"""The JSON-RPC server and client on a real Unix socket.

The server's collaborator here is a small dispatcher that raises the daemon's real errors; the
whole daemon behind the same server is tested in tests/e2e. Wire format: JSON-RPC 2.0
(jsonrpc.org/specification), newline-delimited, at most 64 KiB per request.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import socket
import stat

import pytest
from chargebook.acquire import protocol
from chargebook.acquire.client import (
    ConnectionLost,
    DaemonClient,
    DaemonError,
    UntrustedSocket,
    connect_with_retry,
)
from chargebook.acquire.daemon.server import (
    RpcServer,
    SocketInUse,
    UnsafeSocketDirectory,
    prepare_socket_dir,
)
from chargebook.acquire.engine.engine import ConfirmationRequired
from chargebook.acquire.engine.states import IllegalTransition
from chargebook.acquire.protocol import EngineState
from chargebook.corrections.errors import InputError


async def dispatch(connection, method, params):
    """Answer like the daemon: results, or its real errors."""
    if method == "hello":
        connection.operator = params.get("operator")
        return {"protocol_version": protocol.PROTOCOL_VERSION}
    if method == "subscribe":
        connection.subscribed = True
        return {"seq": 0, "actor": connection.actor}
    if method == "environment.set":
        raise InputError("temperature_C", params["temperature_C"], "10 to 40 °C")
    if method == "set.accept":
        raise IllegalTransition("set.accept", EngineState.IDLE, ["session.start"])
    if method == "session.abort":
        raise ConfirmationRequired("abort needs confirm = true")
    if method == "session.pause":
        raise RuntimeError("a fault inside the daemon")
    return {"method": method, "params": params}


@pytest.fixture
async def server(tmp_path):
    rpc = RpcServer(tmp_path / "private" / "daemon.sock", dispatch)
    await rpc.start()
    yield rpc
    await rpc.close()


async def test_the_socket_is_private_and_a_second_daemon_is_refused(server, tmp_path):
    path = server.socket_path
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o600
    assert stat.S_IMODE(os.stat(path.parent).st_mode) == 0o700
    with pytest.raises(SocketInUse):
        await RpcServer(path, dispatch).start()


async def test_a_stale_socket_is_replaced_and_an_open_directory_refused(tmp_path):
    directory = tmp_path / "private"
    directory.mkdir(mode=0o700)
    stale = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    stale.bind(str(directory / "daemon.sock"))
    stale.close()  # a daemon that died left its socket file behind
    rpc = RpcServer(directory / "daemon.sock", dispatch)
    await rpc.start()
    await rpc.close()
    shared = tmp_path / "shared"
    shared.mkdir()
    shared.chmod(0o755)
    with pytest.raises(UnsafeSocketDirectory, match="755"):
        prepare_socket_dir(shared / "daemon.sock")


async def test_errors_come_back_with_their_codes_and_the_field(server):
    client = await DaemonClient.connect(server.socket_path, client="test", operator="operator C")
    assert client.hello == {"protocol_version": protocol.PROTOCOL_VERSION}
    with pytest.raises(DaemonError) as refused:
        await client.call("environment.set", temperature_C=80.0, pressure=101.0)
    assert refused.value.code == protocol.INPUT_ERROR and refused.value.field == "temperature_C"
    with pytest.raises(DaemonError) as refused:
        await client.call("environment.set", temperature_C="warm", pressure=101.0)
    assert refused.value.code == protocol.INVALID_PARAMS and refused.value.field == "temperature_C"
    with pytest.raises(DaemonError) as refused:
        await client.call("set.accept")
    assert refused.value.code == protocol.ILLEGAL_TRANSITION
    assert refused.value.data["allowed"] == ["session.start"]
    with pytest.raises(DaemonError) as refused:
        await client.call("session.abort", reason="x", confirm=False)
    assert refused.value.code == protocol.CONFIRMATION_REQUIRED
    with pytest.raises(DaemonError) as refused:
        await client.call("session.pause")
    assert refused.value.code == protocol.INTERNAL_ERROR
    assert (await client.call("status")) == {"method": "status", "params": {}}  # still fine
    await client.close()


async def test_notifications_reach_subscribers_only(server):
    listener = await DaemonClient.connect(server.socket_path, operator="operator C")
    bystander = await DaemonClient.connect(server.socket_path)
    assert (await listener.subscribe())["actor"] == "operator C"
    heard = []
    listener.add_listener(heard.append)
    await server.broadcast("snapshot", {"seq": 5, "state": "idle"})
    snapshot = await listener.wait_for_snapshot(lambda s: s["seq"] == 5, 5)
    assert snapshot["state"] == "idle" and heard[0].method == "snapshot"
    notes = listener.notifications()
    assert (await anext(notes)).params["seq"] == 5
    await server.broadcast("event", {"kind": "state_changed"})
    assert (await anext(notes)).method == "event"
    assert (await bystander.call("status"))["method"] == "status"
    await listener.close()
    await bystander.close()


async def test_garbage_and_an_over_long_line_close_only_that_connection(server):
    good = await DaemonClient.connect(server.socket_path)
    reader, writer = await asyncio.open_unix_connection(str(server.socket_path))

    async def exchange(raw: bytes) -> dict:
        writer.write(raw)
        await writer.drain()
        return json.loads(await reader.readline())

    assert (await exchange(b"\xff\xfe not utf-8\n"))["error"]["code"] == protocol.PARSE_ERROR
    assert (await exchange(b'"a string"\n'))["error"]["code"] == protocol.INVALID_REQUEST
    reply = await exchange(b'{"jsonrpc": "2.0", "id": true, "method": "status"}\n')
    assert reply["error"]["code"] == protocol.INVALID_REQUEST
    reply = await exchange(b'{"jsonrpc": "2.0", "id": 9, "method": "status"}\n')
    assert reply["result"]["method"] == "status"  # the same connection still works
    writer.write(b'{"jsonrpc": "2.0", "method": "status"}\n')  # a notification: no reply
    reply = await exchange(b"x" * (protocol.MAX_MESSAGE_BYTES + 10) + b"\n")
    assert reply["error"]["code"] == protocol.INVALID_REQUEST and reply["id"] is None
    assert "65536" in reply["error"]["message"]
    assert await reader.read() == b""
    writer.close()
    assert (await good.call("status"))["method"] == "status"
    await good.close()


async def test_the_client_sees_the_daemon_go_and_can_wait_for_it_to_return(tmp_path):
    path = tmp_path / "private" / "daemon.sock"
    with pytest.raises(OSError):
        await connect_with_retry(path, attempts=2, backoff_s=0.01)
    rpc = RpcServer(path, dispatch)
    await rpc.start()
    client = await connect_with_retry(path, attempts=3, backoff_s=0.01)
    await client.subscribe()
    await rpc.close()
    with pytest.raises(ConnectionLost):
        await client.wait_for_snapshot(lambda s: s["seq"] > 100, 5)
    assert [note async for note in client.notifications()] == []
    with pytest.raises(ConnectionLost):
        await client.call("status")
    await client.close()


async def test_a_subscriber_that_stops_reading_delays_neither_broadcasts_nor_other_clients(server):
    # A suspended console (Ctrl-Z) is a connected socket whose process no longer reads: the
    # daemon used to wait on it while holding its lock, freezing acquisition for everyone.
    stalled = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    stalled.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
    stalled.connect(str(server.socket_path))
    stalled.sendall(b'{"jsonrpc":"2.0","id":1,"method":"subscribe"}\n')
    other = await DaemonClient.connect(server.socket_path)
    for _ in range(100):  # until the server has taken the subscription
        if server.has_subscribers():
            break
        await asyncio.sleep(0.01)
    params = {"seq": 1, "padding": "x" * 20_000}
    # 400 snapshots of 20 kB: far beyond the socket's buffers and the 4 MiB outgoing bound.
    for _ in range(400):
        await asyncio.wait_for(server.broadcast("snapshot", params), 2.0)
    reply = await asyncio.wait_for(other.call("status"), 5.0)
    assert reply["method"] == "status"
    assert not server.has_subscribers()  # the stalled reader was let go, with a logged reason
    stalled.close()
    await other.close()


async def test_a_daemon_message_longer_than_the_request_limit_reaches_the_client(server):
    # A snapshot of a long session outgrows 64 KiB; the request limit must not bound it.
    listener = await DaemonClient.connect(server.socket_path)
    await listener.subscribe()
    await server.broadcast("snapshot", {"seq": 9, "sets": ["x" * 1000] * 300})
    snapshot = await listener.wait_for_snapshot(lambda s: s["seq"] == 9, 5)
    assert len(snapshot["sets"]) == 300
    await listener.close()


def test_a_symlinked_socket_directory_is_refused(tmp_path):
    real = tmp_path / "real"
    real.mkdir(mode=0o700)
    (tmp_path / "link").symlink_to(real)
    with pytest.raises(UnsafeSocketDirectory, match="symbolic link"):
        prepare_socket_dir(tmp_path / "link" / "daemon.sock")


async def test_a_client_sends_nothing_through_a_directory_another_user_could_have_made(tmp_path):
    # Another local user pre-creates the socket directory (open to others) and listens in it:
    # the client refuses before a single byte (an operator's action) reaches the impostor.
    shared = tmp_path / "chargebook-impostor"
    shared.mkdir()
    shared.chmod(0o755)
    heard = []

    async def impostor(reader, writer):
        heard.append(await reader.read(100))
        writer.close()

    listener = await asyncio.start_unix_server(impostor, path=str(shared / "daemon.sock"))
    with pytest.raises(UntrustedSocket, match="755"):
        await DaemonClient.connect(shared / "daemon.sock", operator="operator A")
    await asyncio.sleep(0.05)
    listener.close()
    assert heard == []


@pytest.mark.skipif(os.getuid() != 0, reason="starting a process as another user needs root")
def test_a_client_refuses_a_daemon_that_runs_as_another_user(tmp_path):
    # The directory is private and ours, but the process that listens runs as another uid.
    directory = tmp_path / "private"
    directory.mkdir(mode=0o700)
    path = directory / "daemon.sock"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    sock.bind(str(path))
    ready_r, ready_w = os.pipe()
    child = os.fork()
    if child == 0:  # the impostor: drops to nobody, then listens (SO_PEERCRED names it)
        os.setuid(65534)
        sock.listen(1)
        os.write(ready_w, b"1")
        conn, _ = sock.accept()
        os._exit(1 if conn.recv(100) else 0)
    sock.close()
    assert os.read(ready_r, 1) == b"1"  # it listens
    try:
        with pytest.raises(UntrustedSocket, match="uid 65534"):
            asyncio.run(DaemonClient.connect(path, operator="operator A"))
    finally:
        os.kill(child, 15)
        os.waitpid(child, 0)


async def test_two_hundred_clients_connecting_at_once_are_all_taken(server):
    clients = await asyncio.gather(
        *(DaemonClient.connect(server.socket_path) for _ in range(200)), return_exceptions=True
    )
    failed = [c for c in clients if isinstance(c, BaseException)]
    assert failed == []
    await asyncio.gather(*(c.close() for c in clients))


def _service_directory(tmp_path, name: str, gid: int = 0, mode: int = 0o750):
    """Return a socket directory as a service account (uid 65534) with a socket group makes."""
    directory = tmp_path / name
    directory.mkdir()
    os.chown(directory, 65534, gid)
    directory.chmod(mode)
    return directory


@contextlib.contextmanager
def _listening_as(uid: int, path):
    """Run a process that drops to ``uid`` (keeping group 0), listens on ``path`` and answers
    one JSON-RPC hello; end it on leaving."""
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    sock.bind(str(path))
    ready_r, ready_w = os.pipe()
    child = os.fork()
    if child == 0:
        os.setgroups([0])
        os.setuid(uid)
        sock.listen(1)
        os.write(ready_w, b"1")
        conn, _ = sock.accept()
        conn.recv(4096)
        conn.sendall(b'{"jsonrpc": "2.0", "id": 1, "result": {"protocol_version": "1.0"}}\n')
        conn.recv(1)
        os._exit(0)
    sock.close()
    assert os.read(ready_r, 1) == b"1"
    try:
        yield
    finally:
        os.kill(child, 15)
        os.waitpid(child, 0)


@pytest.mark.skipif(os.getuid() != 0, reason="starting a process as another user needs root")
def test_a_client_accepts_a_daemon_of_another_user_through_its_groups_0750_directory(tmp_path):
    # A service account (here uid 65534) runs the daemon with a socket group this user is in
    # (group 0): the directory is the service's, 0750, group-owned; the client talks to it.
    directory = _service_directory(tmp_path, "run")
    with _listening_as(65534, directory / "daemon.sock"):
        client = asyncio.run(DaemonClient.connect(directory / "daemon.sock"))
        assert client.hello == {"protocol_version": "1.0"}
        asyncio.run(client.close())


@pytest.mark.skipif(os.getuid() != 0, reason="starting a process as another user needs root")
def test_a_group_directory_does_not_vouch_for_a_third_user_or_a_foreign_group(tmp_path):
    directory = _service_directory(tmp_path, "run")
    with (
        _listening_as(1, directory / "daemon.sock"),  # uid 1 is not the directory's owner
        pytest.raises(UntrustedSocket, match=r"uid 1 .*nor as its directory's owner"),
    ):
        asyncio.run(DaemonClient.connect(directory / "daemon.sock"))
    foreign = _service_directory(tmp_path, "foreign", gid=20)  # a group root is not in
    with pytest.raises(UntrustedSocket, match="not to your group"):
        asyncio.run(DaemonClient.connect(foreign / "daemon.sock"))
    writable = _service_directory(tmp_path, "writable", mode=0o770)  # the group could swap it
    with pytest.raises(UntrustedSocket, match="770"):
        asyncio.run(DaemonClient.connect(writable / "daemon.sock"))
