"""End to end: `chargebook serve` as a service: systemd's notify protocol, the watch-only socket,
the station file and the socket group, on the real daemon process.

The service manager is played by a real Unix datagram socket the test binds and passes to the
daemon as NOTIFY_SOCKET, as systemd does (the sd_notify protocol: man sd_notify(3)).
"""

from __future__ import annotations

import grp
import os
import socket
import stat
import subprocess
import time

import pytest
from chargebook.acquire import protocol
from chargebook.acquire.client import DaemonClient, DaemonError
from chargebook.acquire.commands.operator_auto import AutoOperator, environment_from_bench
from chargebook.acquire.record.store import Store
from e2e_support import QUICK_PLAN, chargebook_command

pytestmark = pytest.mark.e2e

#: A bound on waiting for one datagram, so a daemon that never speaks fails the test.
RECEIVE_BOUND_S = 60


def _receive(manager: socket.socket) -> str:
    return manager.recv(4096).decode()


def test_serve_tells_the_service_manager_ready_watchdog_and_stopping(
    start_daemon, simulator, tmp_path
):
    manager = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    address = f"chargebook-test-{os.getpid()}-{id(tmp_path)}"
    manager.bind(b"\0" + address.encode())  # an abstract socket, named "@..." in the variable
    manager.settimeout(RECEIVE_BOUND_S)
    env = dict(os.environ, NOTIFY_SOCKET="@" + address, WATCHDOG_USEC="200000")
    daemon = start_daemon(simulator, env=env)
    try:
        assert _receive(manager) == "READY=1"  # the first word, once the socket listens
        probe = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        probe.connect(str(daemon.socket))  # it does listen
        probe.close()
        assert _receive(manager) == "WATCHDOG=1"
        assert _receive(manager) == "WATCHDOG=1"  # again, from the daemon's loop
        daemon.stop()
        said = _receive(manager)
        while said == "WATCHDOG=1":
            said = _receive(manager)
        assert said == "STOPPING=1"
        assert daemon.process.returncode == 0
    finally:
        manager.close()


def test_serve_on_a_path_notify_socket_says_ready(start_daemon, simulator, tmp_path):
    path = tmp_path / "n"
    manager = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    manager.bind(str(path))
    manager.settimeout(RECEIVE_BOUND_S)
    start_daemon(simulator, env=dict(os.environ, NOTIFY_SOCKET=str(path)))
    try:
        assert _receive(manager) == "READY=1"
    finally:
        manager.close()


async def test_the_watch_socket_shows_everything_and_refuses_every_action_by_name(
    daemon, simulator, metadata
):
    watch_path = daemon.socket.parent / "watch.sock"
    assert daemon.info["watch_socket"] == str(watch_path)
    watcher = await DaemonClient.connect(watch_path, client="watch test")
    assert watcher.hello["watch_only"] is True
    first = await watcher.subscribe()
    assert first["state"] == "idle"
    with pytest.raises(DaemonError) as refused:
        await watcher.call("session.start", metadata=metadata)
    assert refused.value.code == protocol.METHOD_NOT_FOUND
    assert str(refused.value).startswith("session.start is refused: this is the watch-only")
    assert "actions are taken on the control socket" in str(refused.value)
    for method in ("step.arm", "session.abort", "unsubscribe"):
        with pytest.raises(DaemonError, match=f"{method} is refused"):
            await watcher.call(method)
    assert (await watcher.status())["state"] == "idle"  # nothing was started from here
    # The control socket acts; the watcher sees it happen.
    operator_client = await daemon.connect()
    operator = AutoOperator(operator_client, environment_from_bench(simulator.control))
    started = await operator.start(metadata)
    seen = await watcher.wait_for_snapshot(lambda s: s["session"] is not None)
    assert seen["session"]["id"] == started["session"]["id"]
    await operator_client.close()
    await watcher.close()
    with Store.open(daemon.db, read_only=True) as store:
        actors = {row[0] for row in store.db.execute("SELECT actor FROM events")}
    assert "watch test" not in actors  # the watcher did nothing that was recorded


def test_an_unknown_station_file_key_is_refused_by_name(tmp_path):
    config = tmp_path / "station.toml"
    config.write_text('profile = "query-plain"\nport = "/dev/null"\nbaud = 9600\n')
    command = chargebook_command("serve", "--config", str(config))
    done = subprocess.run(command, capture_output=True, text=True, timeout=60, check=False)
    assert done.returncode == 2
    assert "baud" in done.stderr and "is not a station file key" in done.stderr
    assert done.stdout == ""


def test_serve_without_a_profile_anywhere_says_so(tmp_path):
    env = dict(os.environ, XDG_CONFIG_HOME=str(tmp_path))  # no station file there
    command = chargebook_command("serve", "--port", "/dev/null")
    done = subprocess.run(command, capture_output=True, text=True, timeout=60, check=False, env=env)
    assert done.returncode == 2
    assert "--profile" in done.stderr and "no station file was found" in done.stderr


def test_the_station_file_runs_the_daemon_and_the_command_line_overrides_it(
    start_daemon, simulator, tmp_path
):
    config_home = tmp_path / "config"
    (config_home / "chargebook").mkdir(parents=True)
    db = tmp_path / "from-file.sqlite"
    group = grp.getgrgid(os.getgid()).gr_name
    (config_home / "chargebook" / "station.toml").write_text(
        f'profile = "{simulator.profile}"\nport = "{simulator.serial}"\n'
        f'plan = "{QUICK_PLAN}"\ndatabase = "{db}"\nstation_name = "Bunker B bench"\n'
        f'socket = "{tmp_path / "unused" / "daemon.sock"}"\nsocket_group = "{group}"\n'
    )
    env = dict(os.environ, XDG_CONFIG_HOME=str(config_home))
    command = chargebook_command("serve", "--socket", str(tmp_path / "cli" / "daemon.sock"))
    with (tmp_path / "serve.log").open("wb") as log:
        process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=log, env=env)
    try:
        from e2e_support import read_ready_line

        info = read_ready_line(process, tmp_path / "serve.log")
        assert info["db"] == str(db)  # from the file
        assert info["profile"] == simulator.profile
        assert info["socket"] == str(tmp_path / "cli" / "daemon.sock")  # the option wins
        directory = tmp_path / "cli"
        assert stat.S_IMODE(directory.stat().st_mode) == 0o750
        assert directory.stat().st_gid == os.getgid()
        for name in ("daemon.sock", "watch.sock"):
            assert stat.S_IMODE((directory / name).stat().st_mode) == 0o660
            assert (directory / name).stat().st_gid == os.getgid()
    finally:
        from e2e_support import stop_process

        stop_process(process)
    assert process.returncode == 0
    with Store.open(db, read_only=True) as store:
        assert store.station().name == "Bunker B bench"  # station_name from the file


@pytest.mark.slow  # a whole demo run
def test_the_demo_reads_no_station_file(tmp_path):
    # A station machine's own file (here one serve would refuse) must not reach the demo.
    (tmp_path / "chargebook").mkdir()
    (tmp_path / "chargebook" / "station.toml").write_text('thresholds = "x"\nbaud = 1\n')
    env = dict(os.environ, XDG_CONFIG_HOME=str(tmp_path))
    command = chargebook_command(
        "demo", "--unattended", "--plan", QUICK_PLAN, "--time-scale", "0.02",
        "--db", str(tmp_path / "demo.sqlite"),
    )  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, timeout=120, env=env)
    assert done.returncode == 0, done.stderr
    assert "baud" not in done.stderr


def test_an_unreachable_electrometer_is_logged_at_the_default_level_once_per_cause(tmp_path):
    # A service manager keeps WARNING and above: the operator's first clue must be among them,
    # and the retries (every 0.2 to 2 s) must not flood the journal.
    log_path = tmp_path / "serve.log"
    command = chargebook_command(
        "serve", "--profile", "query-plain", "--port", str(tmp_path / "no-such-tty"),
        "--db", str(tmp_path / "s.sqlite"), "--socket", str(tmp_path / "run" / "d.sock"),
        "--config", os.devnull,
    )  # fmt: skip
    with log_path.open("wb") as log:
        process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=log)
    try:
        from e2e_support import read_ready_line

        read_ready_line(process, log_path)
        for _ in range(600):  # until the first attempt has been logged
            if "not reachable" in log_path.read_text():
                break
            time.sleep(0.05)
        time.sleep(3.0)  # several retries with the same cause
    finally:
        from e2e_support import stop_process

        stop_process(process)
    said = [line for line in log_path.read_text().splitlines() if "not reachable" in line]
    assert len(said) == 1, said
    assert "no-such-tty" in said[0]
    help_text = subprocess.run(
        chargebook_command("serve", "--help"), capture_output=True, text=True, check=True
    ).stdout
    assert "once per new cause" in " ".join(help_text.split())


def test_a_watch_socket_path_that_is_taken_stops_the_start_and_leaves_no_control_socket(tmp_path):
    run = tmp_path / "run"
    run.mkdir(mode=0o700)
    (run / "watch.sock").write_text("not a socket")
    command = chargebook_command(
        "serve", "--profile", "query-plain", "--port", "/dev/null",
        "--db", str(tmp_path / "s.sqlite"), "--socket", str(run / "daemon.sock"),
        "--config", os.devnull,
    )  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, timeout=60, check=False)
    assert done.returncode == 2
    assert "watch.sock exists and is not a socket" in done.stderr
    assert not (run / "daemon.sock").exists()
