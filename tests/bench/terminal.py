"""A terminal of our own: a program on a pseudo-terminal of 80 × 24 whose output we keep, timed.

The program (the real ``chargebook console``) writes to the slave side as it would to any
terminal; a thread reads the master side as fast as it comes and notes when each chunk arrived.
Text is found in what was written (escape sequences between its characters allowed), with the
time the last of its bytes reached the terminal: when it was on screen.
"""

from __future__ import annotations

import bisect
import contextlib
import fcntl
import os
import re
import signal
import struct
import subprocess
import termios
import threading
import time
from collections.abc import Iterator

COLUMNS, ROWS = 80, 24
READ_BYTES = 65536


class Terminal:
    """Runs ``command`` on a fresh pty of ``COLUMNS`` × ``ROWS`` and records its output."""

    def __init__(self, command: list[str]) -> None:
        self._master, slave = os.openpty()
        fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", ROWS, COLUMNS, 0, 0))
        environment = dict(os.environ, TERM="xterm-256color", COLUMNS=str(COLUMNS))
        environment["LINES"] = str(ROWS)
        try:  # Textual draws on stderr, so every stream is the terminal
            self.process = subprocess.Popen(
                command,
                stdin=slave,
                stdout=slave,
                stderr=slave,
                env=environment,
                start_new_session=True,
                close_fds=True,
            )
        finally:
            os.close(slave)
        self.output = bytearray()
        self._ends: list[int] = []  # offset just past each chunk
        self._times: list[float] = []  # wall time (time.time()) each chunk arrived
        self._lock = threading.Lock()
        self._reader = threading.Thread(target=self._read, name="terminal", daemon=True)
        self._reader.start()

    def _read(self) -> None:
        while True:
            try:
                chunk = os.read(self._master, READ_BYTES)
            except OSError:  # the program is gone and the slave side closed
                return
            if not chunk:
                return
            arrived = time.time()
            with self._lock:
                self.output += chunk
                self._ends.append(len(self.output))
                self._times.append(arrived)

    def arrivals(self, pattern: re.Pattern[bytes]) -> Iterator[tuple[float, re.Match[bytes]]]:
        """Yield (wall time the match was complete on screen, match), in order of output."""
        with self._lock:
            output, ends, times = bytes(self.output), list(self._ends), list(self._times)
        for match in pattern.finditer(output):
            chunk = bisect.bisect_left(ends, match.end())
            yield times[chunk], match

    def shows(self, pattern: re.Pattern[bytes]) -> bool:
        """Return True once ``pattern`` appeared in the output."""
        with self._lock:
            return pattern.search(self.output) is not None

    def close(self) -> None:
        """Stop the program (SIGTERM, then SIGKILL) and close the terminal."""
        if self.process.poll() is None:
            with contextlib.suppress(ProcessLookupError):
                os.killpg(self.process.pid, signal.SIGTERM)
            try:
                self.process.wait(5)
            except subprocess.TimeoutExpired:
                os.killpg(self.process.pid, signal.SIGKILL)
                self.process.wait()
        os.close(self._master)
        self._reader.join(2)


def text_pattern(text: str) -> bytes:
    """Return a bytes regex for ``text`` with terminal escape sequences allowed between chars."""
    escapes = rb"(?:\x1b\[[0-9;:?]*[ -/]*[@-~])*"
    return escapes.join(re.escape(char.encode()) for char in text)
