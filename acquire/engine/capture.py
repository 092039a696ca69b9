"""Capture of one reading from the electrometer's sample stream.

Three ways a reading is captured (the ``capture`` column of the store):

* ``auto``: end-of-beam detection. After the electrometer is armed, the integrated charge rises
  above ``rise_threshold_nC`` (the beam is on), then holds flat within the flatness tolerance
  for ``hold_s`` seconds (the beam is off): the reading is the last charge seen. A timed
  integration (leakage, no beam) is also ``auto``: the reading is the charge after its duration.
* ``pushed``: the instrument itself sends a completed reading (``Sample.complete``).
* ``manual``: the operator captures the charge integrated so far.

An auto-reset instrument (``resets_itself``) zeroes its integrator once it has pushed a
completed reading. If that line never arrives (garbled on the wire, refused by the driver), the
charge falls from the beam's back to where it started: the reading is ``lost`` (never stored:
the engine drops it), where end-of-beam detection would take the reset integrator's charge.

Pure: no I/O and no clock of its own; times are the instrument clock's seconds passed in.
"""

from __future__ import annotations

import enum
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

from chargebook.acquire.protocol import ReadingPhase
from chargebook.acquire.session.plan import Plan


class CaptureKind(enum.StrEnum):
    AUTO = "auto"
    PUSHED = "pushed"
    MANUAL = "manual"
    #: not a reading (never stored): an auto-reset instrument reset itself before its
    #: completed reading was received
    LOST = "lost"


@dataclass(frozen=True, slots=True)
class CaptureSettings:
    """Thresholds of end-of-beam detection (defaults: common practice for ~20 nC readings).

    ``rise_threshold_nC``: charge change from the armed value that means the beam is on.
    ``flat_tolerance_pct`` / ``flat_tolerance_nC``: the charge counts as flat while it stays
    within the larger of these (percent of the charge, or nC) of the start of the flat stretch.
    ``hold_s``: how long it must stay flat before end of beam is declared, in seconds.
    """

    rise_threshold_nC: float = 0.05
    flat_tolerance_pct: float = 0.02
    flat_tolerance_nC: float = 0.001
    hold_s: float = 1.0

    def __post_init__(self) -> None:
        for name in ("rise_threshold_nC", "flat_tolerance_pct", "flat_tolerance_nC", "hold_s"):
            value = getattr(self, name)
            if not value > 0:
                raise ValueError(f"{name} = {value!r} is not allowed: expected a number > 0")


@dataclass(frozen=True, slots=True)
class Captured:
    """A finished reading: its charge in nC, the instrument time it was taken, how."""

    charge_nC: float
    t_s: float
    capture: CaptureKind
    integration_s: float  # from arming to capture


class ReadingCapture:
    """Follows one reading from arming to capture; feed it samples and clock ticks.

    ``timed_s`` set: a timed integration (no beam) that ends ``timed_s`` seconds after arming.
    ``baseline_nC``: the charge at arming when known (0 after the integrator was zeroed), so a
    beam already under way at the first sample is still seen rising; None takes the first sample.
    ``resets_itself``: the instrument zeroes itself after a completed reading it pushes (see the
    module docstring: a fall back to the baseline after the rise is a lost reading).
    """

    def __init__(
        self,
        settings: CaptureSettings,
        armed_t_s: float,
        timed_s: float | None = None,
        baseline_nC: float | None = None,
        resets_itself: bool = False,
    ):
        self.settings = settings
        self.resets_itself = resets_itself
        self.armed_t_s = armed_t_s
        self.timed_s = timed_s
        self.phase = ReadingPhase.TIMED if timed_s is not None else ReadingPhase.ARMED
        self.baseline_nC = baseline_nC
        self.last_charge_nC: float | None = None
        self.last_t_s: float | None = None
        self._flat_ref_nC = 0.0
        self._flat_since_s = armed_t_s

    def feed(self, t_s: float, charge_nC: float, complete: bool = False) -> Captured | None:
        """Take one sample; return the reading if this sample completes it.

        A sample received before the reading was armed (a stale line) is ignored.
        """
        if t_s < self.armed_t_s:
            return None
        if self.baseline_nC is None:
            self.baseline_nC = charge_nC
        if not complete and self._reset_seen(charge_nC):
            return self._done(CaptureKind.LOST, t_s)  # the charge the beam had brought, kept
        self.last_charge_nC, self.last_t_s = charge_nC, t_s
        if complete:
            return self._done(CaptureKind.PUSHED, t_s)
        if self.phase is ReadingPhase.TIMED:
            return self.tick(t_s)
        if self.phase is ReadingPhase.ARMED:
            if abs(charge_nC - self.baseline_nC) > self.settings.rise_threshold_nC:
                self.phase = ReadingPhase.RISING
                self._flat_ref_nC, self._flat_since_s = charge_nC, t_s
            return None
        tolerance = max(
            self.settings.flat_tolerance_nC,
            abs(self._flat_ref_nC) * self.settings.flat_tolerance_pct / 100.0,
        )
        if abs(charge_nC - self._flat_ref_nC) > tolerance:
            self.phase = ReadingPhase.RISING
            self._flat_ref_nC, self._flat_since_s = charge_nC, t_s
            return None
        self.phase = ReadingPhase.HOLDING
        return self.tick(t_s)

    def feed_run(self, samples: Sequence[Any]) -> tuple[int, Captured | None, dict[str, Any]]:
        """Feed samples (each with ``t_s``, ``charge_nC`` and ``complete``) in order until one
        completes the reading: as :meth:`feed` for each, in one call. Return (how many were fed,
        the reading or None, this capture's state before the last sample fed, to put back if
        the reading cannot be recorded; {} when no sample completed it).

        A sample that cannot complete the reading (see :meth:`_may_complete`) is fed without a
        copy of the state: of a timed integration only its charge and time are kept here.
        """
        start = self._take_timed(samples) if self.phase is ReadingPhase.TIMED else 0
        for index in range(start, len(samples)):
            sample = samples[index]
            t_s = sample.t_s
            if t_s < self.armed_t_s:
                continue  # a stale line, ignored as feed ignores it
            if not self._may_complete(t_s, sample.complete, sample.charge_nC):
                if self.phase is ReadingPhase.TIMED:
                    if self.baseline_nC is None:
                        self.baseline_nC = sample.charge_nC
                    self.last_charge_nC, self.last_t_s = sample.charge_nC, t_s
                else:
                    self.feed(t_s, sample.charge_nC, sample.complete)
                continue
            before = vars(self).copy()
            captured = self.feed(t_s, sample.charge_nC, sample.complete)
            if captured is not None:
                return index + 1, captured, before
        return len(samples), None, {}

    def _take_timed(self, samples: Sequence[Any]) -> int:
        """Take the samples of a timed integration up to the first that may complete it (as
        :meth:`feed_run` takes each, in one tight loop: a streaming instrument pushes thousands
        while it integrates); return that sample's index (the count when none may)."""
        armed_t_s, timed_s = self.armed_t_s, self.timed_s
        last, stop = None, len(samples)
        for index, sample in enumerate(samples):
            t_s = sample.t_s
            if t_s < armed_t_s:
                continue  # a stale line, ignored as feed ignores it
            if sample.complete or (timed_s is not None and t_s - armed_t_s >= timed_s):
                stop = index
                break
            if last is None and self.baseline_nC is None:
                self.baseline_nC = sample.charge_nC
            last = sample
        if last is not None:
            self.last_charge_nC, self.last_t_s = last.charge_nC, last.t_s
        return stop

    def _may_complete(self, t_s: float, complete: bool, charge_nC: float) -> bool:
        """Return False when a sample at ``t_s`` (not stale) of ``charge_nC`` surely does not
        complete the reading: :meth:`feed` completes one only when it is marked complete, when a
        timed integration's time is up, when the charge has held flat for the hold time, or
        when an auto-reset instrument's charge fell back to the baseline (a lost reading)."""
        if complete or (self.resets_itself and self._reset_seen(charge_nC)):
            return True  # (resets_itself first: no call per sample of a plain instrument)
        if self.phase is ReadingPhase.TIMED:
            return self.timed_s is not None and t_s - self.armed_t_s >= self.timed_s
        if self.phase is ReadingPhase.ARMED:
            return False
        return t_s - self._flat_since_s >= self.settings.hold_s or self.phase is ReadingPhase.IDLE

    def _reset_seen(self, charge_nC: float) -> bool:
        """Return True if ``charge_nC`` (nC) shows that an auto-reset instrument zeroed itself
        after the beam: the charge rose, and is now back within the rise threshold of the
        baseline (nothing else takes the charge an integrator holds back down)."""
        return (
            self.resets_itself
            and self.phase in (ReadingPhase.RISING, ReadingPhase.HOLDING)
            and self.baseline_nC is not None
            and abs(charge_nC - self.baseline_nC) <= self.settings.rise_threshold_nC
        )

    def tick(self, now_s: float) -> Captured | None:
        """Return the reading if the hold time (or the timed duration) has passed at ``now_s``."""
        if self.last_charge_nC is None:
            return None
        if self.phase is ReadingPhase.TIMED:
            if self.timed_s is not None and now_s - self.armed_t_s >= self.timed_s:
                return self._done(CaptureKind.AUTO, now_s)
            return None
        held_s = now_s - self._flat_since_s
        if self.phase is ReadingPhase.HOLDING and held_s >= self.settings.hold_s:
            return self._done(CaptureKind.AUTO, now_s)
        return None

    def capture_now(self, now_s: float) -> Captured | None:
        """Return the charge integrated so far as a manual reading (None before any sample)."""
        if self.last_charge_nC is None:
            return None
        return self._done(CaptureKind.MANUAL, now_s)

    def _done(self, kind: CaptureKind, t_s: float) -> Captured:
        assert self.last_charge_nC is not None
        self.phase = ReadingPhase.IDLE
        return Captured(self.last_charge_nC, t_s, kind, max(0.0, t_s - self.armed_t_s))


#: The shortest hold time after scaling, s: a few polls of a query-mode electrometer.
MIN_SCALED_HOLD_S = 0.15


def capture_settings(plan: Plan, time_scale: float = 1.0) -> CaptureSettings:
    """Return the end-of-beam settings: the engine's defaults with the plan's overrides.

    ``time_scale`` (< 1 for a simulated electrometer running faster than real time) shortens
    the hold time, but not below MIN_SCALED_HOLD_S.
    """
    settings = CaptureSettings(**plan.capture.overrides())
    if time_scale == 1.0:
        return settings
    hold_s = max(settings.hold_s * time_scale, min(settings.hold_s, MIN_SCALED_HOLD_S))
    return replace(settings, hold_s=hold_s)
