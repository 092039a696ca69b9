"""`chargebook demo`: the simulated electrometer, the daemon and the console (or the automatic
operator), each a process of its own, with a clean shutdown whatever happens.

The demo has its own database (``<data dir>/chargebook/demo.sqlite`` unless ``--db``), never
the station's record, and invented session metadata (``demo_data``).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import json
import os
import select
import shutil
import signal
import subprocess
import sys
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TextIO

from chargebook.acquire.cli import EXIT_FAILURE, EXIT_OK

STARTUP_TIMEOUT_S = 30.0


class DemoError(RuntimeError):
    """A part of the demo could not start; the message says which and where its log is."""


@dataclass
class Child:
    """A subprocess of the demo and the JSON object it printed when ready."""

    name: str
    process: subprocess.Popen
    info: dict[str, Any]
    log_path: Path


def chargebook_args(*args: str) -> list[str]:
    """Return the command line running `chargebook ARGS` with this interpreter."""
    return [sys.executable, "-m", "chargebook.acquire.cli", *args]


def read_ready_line(process: subprocess.Popen, log_path: Path, name: str) -> dict[str, Any]:
    """Return the JSON object a chargebook process prints first on stdout.

    Raises DemoError with the tail of its log (and stops it) when it prints nothing in time.
    """
    assert process.stdout is not None
    ready, _, _ = select.select([process.stdout], [], [], STARTUP_TIMEOUT_S)
    line = process.stdout.readline() if ready else b""
    if not line:
        stop_child(process)
        raise DemoError(f"the {name} did not start; its log is {log_path}:\n{_tail(log_path)}")
    return json.loads(line)


def start_child(name: str, args: list[str], log_path: Path) -> Child:
    """Start a chargebook subprocess and return it once it printed its JSON ready line."""
    with log_path.open("wb") as log:
        process = subprocess.Popen(chargebook_args(*args), stdout=subprocess.PIPE, stderr=log)
    return Child(name, process, read_ready_line(process, log_path, name), log_path)


def _tail(path: Path, lines: int = 15) -> str:
    return "\n".join(path.read_text(errors="replace").splitlines()[-lines:])


def stop_child(process: subprocess.Popen) -> None:
    """Stop a subprocess with SIGTERM (SIGKILL after 10 s) and reap it."""
    if process.poll() is None:
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(10)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()
    if process.stdout is not None:
        process.stdout.close()


@contextlib.contextmanager
def demo_world(args: argparse.Namespace, workdir: Path) -> Iterator[tuple[Child, Child]]:
    """Start the simulator and the daemon on it; stop both on the way out."""
    children: list[Child] = []
    try:
        simulator = start_child(
            "simulated electrometer",
            [
                "simulate", "--serial", "--profile", args.profile, "--seed", str(args.seed),
                "--time-scale", str(args.time_scale),
            ],
            workdir / "simulator.log",
        )  # fmt: skip
        children.append(simulator)
        daemon = start_child(
            "daemon",
            [
                "serve", "--profile", args.profile, "--port", simulator.info["serial"],
                "--bench-control", simulator.info["control"], "--db", str(args.db_path),
                "--socket", str(workdir / "daemon.sock"), "--plan", args.plan,
                "--time-scale", str(args.time_scale), "--log-level", "INFO",
                "--config", os.devnull,  # the demo reads no station file
            ],
            workdir / "daemon.log",
        )  # fmt: skip
        children.append(daemon)
        yield simulator, daemon
    finally:
        for child in reversed(children):
            stop_child(child.process)


def run_demo(args: argparse.Namespace) -> int:
    """Run the demo as asked; return the exit status."""
    from chargebook.acquire.store import default_db_path

    args.db_path = (
        Path(args.db).expanduser() if args.db else default_db_path().with_name("demo.sqlite")
    )
    args.db_path.parent.mkdir(parents=True, exist_ok=True)
    out = sys.stderr if args.json else sys.stdout
    print(f"demo database: {args.db_path}", file=out)
    workdir = Path(tempfile.mkdtemp(prefix="chargebook-demo-"))
    try:
        with demo_world(args, workdir) as (simulator, daemon):
            socket_path = daemon.info["socket"]
            if not args.unattended and _open_console(args, socket_path, simulator) is not None:
                return EXIT_OK
            return asyncio.run(_unattended(args, socket_path, simulator, out))
    except DemoError as error:
        print(f"chargebook demo: {error}", file=sys.stderr)
        return EXIT_FAILURE
    except KeyboardInterrupt:
        print("chargebook demo: stopped; the demo database keeps what was recorded", file=out)
        return 130
    finally:
        shutil.rmtree(workdir, ignore_errors=True)


def _open_console(args: argparse.Namespace, socket_path: str, simulator: Child) -> int | None:
    """Run the console on the daemon; None when the console is not installed."""
    try:
        from chargebook.tui.app import run_console
    except ImportError:
        return None
    from chargebook.acquire.bench import Bench
    from chargebook.acquire.demo_data import demo_metadata

    bench = Bench(simulator.info["control"])
    try:
        temperature_C, pressure_kPa = bench.environment()
    finally:
        bench.close()
    defaults = {
        **demo_metadata(),
        "temperature_C": temperature_C,
        "pressure_entered": pressure_kPa,
        "pressure_unit": "kPa",
    }
    return run_console(socket_path, setup_defaults=defaults, demo_database=args.db_path)


async def _unattended(
    args: argparse.Namespace, socket_path: str, simulator: Child, out: TextIO
) -> int:
    from chargebook.acquire.bench import Bench
    from chargebook.acquire.client import DaemonClient
    from chargebook.acquire.demo_data import demo_metadata
    from chargebook.acquire.operator_auto import (
        ACTOR,
        AutoOperator,
        AutoOperatorError,
        environment_from_bench,
    )
    from chargebook.acquire.session_result import result_document
    from chargebook.acquire.store import Store
    from chargebook.acquire.summary_text import reading_line, result_table

    bench = Bench(simulator.info["control"])
    environment = environment_from_bench(simulator.info["control"])

    def progress(reading_set: dict[str, Any], reading: dict[str, Any]) -> None:
        print(reading_line(reading_set, reading), file=out, flush=True)

    client = await DaemonClient.connect(socket_path, client="demo", operator=ACTOR)
    try:
        final = await AutoOperator(client, environment, on_reading=progress).run(demo_metadata())
        truth = bench.truth()
    except AutoOperatorError as error:
        print(f"chargebook demo: {error}", file=sys.stderr)
        return EXIT_FAILURE
    finally:
        await client.close()
        bench.close()
    with Store.open(args.db_path, read_only=True) as store:
        document = result_document(store, final["session"]["id"])
    if args.json:
        print(json.dumps({**document, "truth": truth}, indent=2, ensure_ascii=False))
    else:
        print("", file=out)
        print(result_table(document, truth), file=out)
    return EXIT_OK
