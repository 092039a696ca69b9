"""Child processes of chargebook: started as `chargebook ARGS` with this interpreter, ready when
they print their one JSON line, stopped with SIGTERM then SIGKILL.

The demo, replay and the test harnesses start the simulator and the daemon this way.
"""

from __future__ import annotations

import json
import select
import signal
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

STARTUP_TIMEOUT_S = 30.0


class ChildStartError(RuntimeError):
    """A child process could not start; the message says which and where its log is."""


@dataclass
class Child:
    """A subprocess of the demo and the JSON object it printed when ready."""

    name: str
    process: subprocess.Popen
    info: dict[str, Any]
    log_path: Path


def chargebook_args(*args: str) -> list[str]:
    """Return the command line running `chargebook ARGS` with this interpreter."""
    return [sys.executable, "-m", "chargebook", *args]


def read_ready_line(process: subprocess.Popen, log_path: Path, name: str) -> dict[str, Any]:
    """Return the JSON object a chargebook process prints first on stdout.

    Raises ChildStartError with the tail of its log (and stops it) when it prints nothing in time.
    """
    assert process.stdout is not None
    ready, _, _ = select.select([process.stdout], [], [], STARTUP_TIMEOUT_S)
    line = process.stdout.readline() if ready else b""
    if not line:
        stop_child(process)
        raise ChildStartError(
            f"the {name} did not start; its log is {log_path}:\n{_tail(log_path)}"
        )
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
