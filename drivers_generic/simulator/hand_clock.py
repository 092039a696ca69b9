"""A clock that moves only when it is told to, for a simulated electrometer in this process.

Inject :class:`HandClock` as the ``clock`` of the simulated device, the in-memory wire
(:mod:`.memory_wire`) and the driver, and whoever holds it decides when time passes: a test
delivers 100 MU by advancing the clock through the beam's duration instead of waiting for it.
Threads that wait for the instrument wait with :meth:`HandClock.pause`, which returns as soon as
the clock moves (or after a short real-time bound), so nothing spins while time stands still.
"""

from __future__ import annotations

import math
import threading

#: Where a hand clock starts, in seconds (any value; not zero, so an unset time stands out).
START_s = 1000.0


class HandClock:
    """Seconds that pass only by :meth:`advance` (thread-safe); call it to read the time."""

    def __init__(self, start_s: float = START_s) -> None:
        self._now_s = float(start_s)
        self._moved = threading.Condition()

    def __call__(self) -> float:
        """Return the time now, in seconds."""
        return self._now_s

    def advance(self, seconds: float) -> float:
        """Move the clock ``seconds`` (≥ 0) forward and wake whoever pauses; return the new time."""
        if not (math.isfinite(seconds) and seconds >= 0):
            raise ValueError(f"seconds = {seconds!r} is not allowed: expected a number ≥ 0")
        with self._moved:
            self._now_s += seconds
            self._moved.notify_all()
            return self._now_s

    def pause(self, real_s: float) -> None:
        """Wait until the clock moves, at most ``real_s`` real seconds (the clock never moves by
        itself, so a wait for instrument time is a wait for whoever advances it)."""
        with self._moved:
            before = self._now_s
            self._moved.wait_for(lambda: self._now_s != before, timeout=real_s)
