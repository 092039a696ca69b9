"""The simulated instrument on a real pseudo-terminal, at a stable symlink.

``os.openpty`` gives a master (our end) and a slave (the driver's "serial port"); the slave is
put in raw mode and stays open on our side too, so the master never sees EIO while no driver is
connected. The driver opens a symlink in the simulator's private directory that points at the
slave: a *drop* closes the pty (the driver sees the port vanish, as when a cable is pulled) and
later opens a new one behind the same symlink.

One thread serves the master: it reads command lines, answers them through the responder, and
calls the responder's ``tick`` for lines the instrument sends unasked. Unasked lines are dropped
when nobody reads the port (a real instrument's stream is lost the same way); a *flood* waits for
the port instead, to push lines as fast as the reader takes them.
"""

from __future__ import annotations

import contextlib
import logging
import os
import select
import threading
import time
import tty
from pathlib import Path

from chargebook.drivers_generic.profile import Framing
from chargebook.drivers_generic.simulator.dialect import Responder

log = logging.getLogger("chargebook.simulator.pty")

#: The longest command line the simulated instrument buffers before discarding it, in bytes.
MAX_COMMAND_BYTES = 4096
#: How long an answer may wait for a full port before it is dropped, in seconds.
ANSWER_WRITE_TIMEOUT_s = 2.0
#: How long one flood line may wait for a full port before the flood gives up, in seconds.
FLOOD_WRITE_TIMEOUT_s = 10.0


class PtyServer:
    """Serves one responder on a pseudo-terminal reachable at ``link_path``."""

    def __init__(self, responder: Responder, framing: Framing, link_path: Path) -> None:
        self.responder = responder
        self.framing = framing
        self.link_path = Path(link_path)
        self._master: int | None = None
        self._slave: int | None = None
        self._fd_lock = threading.RLock()
        self._write_lock = threading.Lock()
        self._stop = threading.Event()
        self._reopen_at: float | None = None
        self._drop_request: tuple[float, threading.Event] | None = None
        self._buffer = bytearray()
        self._thread = threading.Thread(target=self._serve, name="pty-server", daemon=True)
        self._flood_thread: threading.Thread | None = None
        self.lines_flooded = 0

    # -- life cycle ----------------------------------------------------------------------------
    def start(self) -> None:
        """Open the pty, create the symlink, and start serving."""
        self._open_pty()
        self._thread.start()

    def open(self) -> None:
        """Open the pty and create the symlink, with no serving thread: the caller answers
        each command itself, with :meth:`answer_waiting` (no pushed lines, no drops)."""
        self._open_pty()

    def answer_waiting(self, wait_s: float, commands: int = 1) -> None:
        """Answer the command lines written to the port, waiting up to ``wait_s`` for them to
        come through the pty, until ``commands`` lines are answered and no part of a line is
        left unanswered."""
        master = self._master
        if master is None:
            return
        deadline = time.monotonic() + wait_s
        while True:
            ready, _, _ = select.select([master], [], [], max(deadline - time.monotonic(), 0.0))
            if not ready:
                return
            commands -= self._receive(os.read(master, 4096))
            if not self._buffer and commands <= 0:
                return

    def stop(self) -> None:
        """Stop serving, close the pty and remove the symlink."""
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join(timeout=5)
        if self._flood_thread is not None:
            self._flood_thread.join(timeout=5)
        self._close_pty()

    def drop(self, seconds: float) -> None:
        """Close the pty now (the cable is pulled) and bring a new one back after ``seconds``.

        The serving thread closes it (it owns the descriptors, so no other thread can be left
        waiting on a number the system may hand out again); this waits until it has.
        """
        done = threading.Event()
        self._drop_request = (seconds, done)
        if not done.wait(timeout=5.0):
            raise RuntimeError("the pty server did not drop the port")

    def _drop_now(self) -> None:
        seconds, done = self._drop_request
        self._drop_request = None
        with self._write_lock:
            self._close_pty()
        self._reopen_at = time.monotonic() + seconds
        log.info("pty dropped for %.3f s", seconds)
        done.set()

    @property
    def connected(self) -> bool:
        """Return True while the pty is open (not dropped)."""
        return self._master is not None

    def _open_pty(self) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)
        os.set_blocking(master, False)
        temporary = self.link_path.with_name(self.link_path.name + ".new")
        with contextlib.suppress(FileNotFoundError):
            temporary.unlink()
        os.symlink(os.ttyname(slave), temporary)
        os.replace(temporary, self.link_path)
        with self._fd_lock:
            self._master, self._slave = master, slave
            self._buffer.clear()
        log.info("pty %s at %s", os.ttyname(slave), self.link_path)

    def _close_pty(self) -> None:
        with self._fd_lock:
            with contextlib.suppress(FileNotFoundError):
                self.link_path.unlink()
            for fd in (self._master, self._slave):
                if fd is not None:
                    with contextlib.suppress(OSError):
                        os.close(fd)
            self._master = self._slave = None

    # -- serving -------------------------------------------------------------------------------
    def _serve(self) -> None:
        interval_s = getattr(self.responder, "tick_interval_s", lambda: 0.02)()
        # A live instrument drops pushed lines nobody reads; a playback must deliver them all.
        push_wait_s = getattr(self.responder, "push_wait_s", 0.0)
        while not self._stop.is_set():
            if self._drop_request is not None:
                self._drop_now()
            master = self._master
            if master is None:
                self._reopen_if_due(interval_s)
                continue
            try:
                ready, _, _ = select.select([master], [], [], interval_s)
                if ready:
                    self._receive(os.read(master, 4096))
            except OSError:  # dropped while we waited
                continue
            self.send(self.responder.tick(), wait_s=push_wait_s)

    def _reopen_if_due(self, interval_s: float) -> None:
        reopen_at = self._reopen_at
        if reopen_at is not None and time.monotonic() >= reopen_at:
            self._reopen_at = None
            self._open_pty()
        else:
            self._stop.wait(interval_s)

    def _receive(self, data: bytes) -> int:
        """Answer the command lines ``data`` completes, in one write; return how many."""
        self._buffer += data
        terminator = self.framing.write_terminator
        answers: list[str] = []
        count = 0
        while (end := self._buffer.find(terminator)) >= 0:
            raw = bytes(self._buffer[:end])
            del self._buffer[: end + len(terminator)]
            line = raw.decode(self.framing.encoding, errors="replace").strip("\r\n")
            answers += self.responder.respond(line)
            count += 1
        self.send(answers, wait_s=ANSWER_WRITE_TIMEOUT_s)
        if len(self._buffer) > MAX_COMMAND_BYTES:
            log.warning("discarding %d bytes without a terminator", len(self._buffer))
            self._buffer.clear()
        return count

    def send(self, lines: list[str], *, wait_s: float) -> bool:
        """Write lines to the port; return False if the port stayed full for ``wait_s``."""
        if not lines:
            return True
        terminator = self.framing.read_terminator
        data = b"".join(_encode(line, self.framing.encoding) + terminator for line in lines)
        return self._write_all(data, wait_s)

    def _write_all(self, data: bytes, wait_s: float) -> bool:
        """Write ``data`` whole; give up only if nothing of it fit within ``wait_s``.

        Once part of it is on the wire the rest follows (waiting up to ANSWER_WRITE_TIMEOUT_s
        more), so a full port never delivers a cut line; a line that did not fit at all is
        dropped whole, as an instrument's full output buffer would drop it.
        """
        deadline = time.monotonic() + wait_s
        view = memoryview(data)
        extended = False
        with self._write_lock:
            while view:
                master = self._master
                if master is None:
                    return False
                try:
                    written = os.write(master, view)
                    view = view[written:]
                    continue
                except BlockingIOError:
                    pass
                except OSError:
                    return False
                remaining = deadline - time.monotonic()
                if remaining <= 0 and len(view) < len(data) and not extended:
                    extended, deadline = True, time.monotonic() + ANSWER_WRITE_TIMEOUT_s
                    remaining = ANSWER_WRITE_TIMEOUT_s
                if remaining <= 0 or self._stop.is_set():
                    return False
                with contextlib.suppress(OSError, ValueError):
                    select.select([], [master], [], min(remaining, 0.1))
        return True

    # -- flood ---------------------------------------------------------------------------------
    def flood(self, rate_per_s: float, count: int) -> None:
        """Push ``count`` reading lines at ``rate_per_s`` (0: as fast as the port takes them)."""
        if self._flood_thread is not None and self._flood_thread.is_alive():
            raise RuntimeError("a flood is already running")
        self.lines_flooded = 0
        self._flood_thread = threading.Thread(
            target=self._flood, args=(rate_per_s, count), name="pty-flood", daemon=True
        )
        self._flood_thread.start()

    def wait_flood(self, timeout_s: float | None = None) -> int:
        """Wait for the flood to finish; return the number of lines written."""
        if self._flood_thread is not None:
            self._flood_thread.join(timeout_s)
        return self.lines_flooded

    def _flood(self, rate_per_s: float, count: int) -> None:
        started = time.monotonic()
        for index in range(count):
            if rate_per_s > 0:
                due = started + index / rate_per_s
                if (pause := due - time.monotonic()) > 0:
                    self._stop.wait(pause)
            if self._stop.is_set():
                break
            line = self.responder.flood_line(index)
            if not self.send([line], wait_s=FLOOD_WRITE_TIMEOUT_s):
                log.warning("flood stopped after %d lines: port full or gone", index)
                break
            self.lines_flooded = index + 1


def _encode(line: str, encoding: str) -> bytes:
    """Return the line's bytes; bytes kept by surrogateescape (playback) come back as they were."""
    try:
        return line.encode(encoding, errors="surrogateescape")
    except UnicodeEncodeError:
        return line.encode("utf-8", errors="surrogateescape")
