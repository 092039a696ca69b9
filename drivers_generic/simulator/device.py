"""The simulated electrometer's state machine: integrator, bias, range, beam, environment.

One :class:`SimulatedElectrometer` is shared by every way in (the pty, the SCPI socket, the
control socket), so all its public methods take its lock. Time is wall-clock time from the
injected ``clock``; one simulated second lasts ``time_scale`` wall seconds, so a 100 MU delivery
at 600 MU/min takes 10 s × time_scale. The charge of each delivery is fixed when it starts (see
:mod:`.physics` for why that keeps readings deterministic) and is collected linearly while the
beam is on, and only while the integrator runs.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

from chargebook.drivers_generic.simulator.physics import ChamberPhysics

#: Measurement ranges, most sensitive first: (name, full scale in nC).
RANGES: tuple[tuple[str, float], ...] = (("low", 50.0), ("high", 5000.0))
MAX_BIAS_V = 1000.0
MAX_MU = 10000.0
DOSE_RATE_LIMITS_MU_PER_MIN = (1.0, 2400.0)
TEMPERATURE_LIMITS_C = (-10.0, 50.0)
PRESSURE_LIMITS_kPa = (50.0, 120.0)


class SimulatorInputError(ValueError):
    """A request to the simulated instrument or bench names a value outside what it allows."""

    def __init__(self, field: str, value: object, allowed: str) -> None:
        super().__init__(f"{field} = {value!r} is not allowed; allowed: {allowed}")
        self.field = field
        self.value = value
        self.allowed = allowed


class SimulatorBusy(RuntimeError):
    """The request cannot be done now (a beam is already on)."""


def check_number(field: str, value: object, low: float, high: float, unit: str = "") -> float:
    """Return ``value`` as a float if it is a finite number from ``low`` to ``high``."""
    allowed = f"a number from {low:g} to {high:g} {unit}".rstrip()
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise SimulatorInputError(field, value, allowed)
    if not (math.isfinite(value) and low <= value <= high):
        raise SimulatorInputError(field, value, allowed)
    return float(value)


@dataclass(slots=True)
class _ActiveDelivery:
    mu: float
    charge_nC: float
    started_at: float
    duration_s: float
    fraction_done: float = 0.0


class SimulatedElectrometer:
    """The instrument behind every simulated wire (thread-safe)."""

    def __init__(
        self,
        physics: ChamberPhysics,
        *,
        time_scale: float = 1.0,
        temperature_C: float = 21.5,
        pressure_kPa: float = 100.8,
        bias_V: float = 300.0,
        clock: Callable[[], float] = time.monotonic,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        self.physics = physics
        self.time_scale = check_number("time_scale", time_scale, 1e-6, 1e3)
        self.clock = clock
        self.sleep = sleep
        self.lock = threading.RLock()
        self.temperature_C = check_number("temperature_C", temperature_C, *TEMPERATURE_LIMITS_C)
        self.pressure_kPa = check_number("pressure_kPa", pressure_kPa, *PRESSURE_LIMITS_kPa)
        self.bias_V = check_number("bias_V", bias_V, -MAX_BIAS_V, MAX_BIAS_V, "V")
        self.range_index = len(RANGES) - 1
        self.integrating = False
        self.charge_nC = 0.0
        self.total_mu = 0.0
        self.mu_since_change = math.inf  # the chamber starts settled
        self.settling_deficit = 0.0
        self.spike_pending = False
        self.deliveries_completed = 0
        self.last_delivery: dict[str, float] | None = None
        self._delivery: _ActiveDelivery | None = None
        self._updated_at = clock()

    # -- time --------------------------------------------------------------------------------
    def _advance(self) -> None:
        """Bring the integrator up to now: beam fraction delivered, leakage (simulated time)."""
        now = self.clock()
        if self.integrating:
            simulated_s = (now - self._updated_at) / self.time_scale
            self.charge_nC += self.physics.parameters.leakage_nC_per_s * simulated_s
        self._updated_at = now
        delivery = self._delivery
        if delivery is None:
            return
        elapsed = now - delivery.started_at
        fraction = 1.0 if delivery.duration_s <= 0 else min(1.0, elapsed / delivery.duration_s)
        if self.integrating:
            self.charge_nC += (fraction - delivery.fraction_done) * delivery.charge_nC
        delivery.fraction_done = fraction
        if fraction >= 1.0:
            self._delivery = None
            self.deliveries_completed += 1

    # -- the instrument ------------------------------------------------------------------------
    def zero(self) -> None:
        """Reset the integrated charge to zero."""
        with self.lock:
            self._advance()
            self.charge_nC = 0.0

    def start(self) -> None:
        """Start integrating."""
        with self.lock:
            self._advance()
            self.integrating = True

    def stop(self) -> None:
        """Stop integrating; the charge holds."""
        with self.lock:
            self._advance()
            self.integrating = False

    def read(self) -> tuple[float, str]:
        """Return (charge in nC, status word) now; past full scale: (full scale, "overrange")."""
        with self.lock:
            self._advance()
            full_scale = RANGES[self.range_index][1]
            if abs(self.charge_nC) > full_scale:
                return math.copysign(full_scale, self.charge_nC), "overrange"
            return self.charge_nC, "ok"

    def set_bias(self, volts: object) -> float:
        """Set the chamber bias (signed volts); a change starts the chamber settling again."""
        new = check_number("volts", volts, -MAX_BIAS_V, MAX_BIAS_V, "V")
        with self.lock:
            self._advance()
            parameters = self.physics.parameters
            if (new >= 0) != (self.bias_V >= 0) and new != 0:
                self.settling_deficit = parameters.settling_polarity
                self.mu_since_change = 0.0
            elif abs(new) != abs(self.bias_V):
                self.settling_deficit = parameters.settling_bias
                self.mu_since_change = 0.0
            self.bias_V = new
            return new

    def set_range(self, index: int) -> str:
        """Select range ``index`` (0 = most sensitive); return its name."""
        if not 0 <= index < len(RANGES):
            raise SimulatorInputError("range", index, f"0 to {len(RANGES) - 1}")
        with self.lock:
            self._advance()
            self.range_index = index
            return RANGES[index][0]

    # -- the bench -------------------------------------------------------------------------------
    def beam(self, mu: object, dose_rate_MU_per_min: object = 600.0) -> dict[str, float]:
        """Start delivering ``mu`` MU; return the delivery's wall-clock duration in seconds."""
        mu_value = check_number("mu", mu, 1e-3, MAX_MU, "MU")
        rate = check_number(
            "dose_rate_MU_per_min", dose_rate_MU_per_min, *DOSE_RATE_LIMITS_MU_PER_MIN, "MU/min"
        )
        with self.lock:
            self._advance()
            if self._delivery is not None:
                raise SimulatorBusy("a beam is already on; wait for it to end")
            result = self.physics.deliver(
                mu_value,
                self.bias_V,
                self.temperature_C,
                self.pressure_kPa,
                mu_since_change=self.mu_since_change,
                settling_deficit=self.settling_deficit,
                total_mu_before=self.total_mu,
                force_spike=self.spike_pending,
            )
            self.spike_pending = False
            self.mu_since_change += mu_value
            self.total_mu += mu_value
            duration_s = mu_value / rate * 60.0 * self.time_scale
            self._delivery = _ActiveDelivery(mu_value, result.charge_nC, self.clock(), duration_s)
            self.last_delivery = {
                "mu": mu_value,
                "charge_nC": result.charge_nC,
                "noise_relative": result.noise_relative,
                "spike_relative": result.spike_relative,
                "settling_factor": result.settling_factor,
            }
            self._advance()
            return {"mu": mu_value, "dose_rate_MU_per_min": rate, "duration_s": duration_s}

    def beam_remaining_s(self) -> float:
        """Return the wall seconds until the beam now on ends (0 when none is on)."""
        with self.lock:
            self._advance()
            delivery = self._delivery
            if delivery is None:
                return 0.0
            return max(0.0, delivery.started_at + delivery.duration_s - self.clock())

    def wait_for_beam(self) -> None:
        """Block until the beam now on has ended (using the injected sleep)."""
        while (remaining := self.beam_remaining_s()) > 0:
            self.sleep(remaining)

    def beam_on(self) -> bool:
        """Return True while a delivery is in progress."""
        return self.beam_remaining_s() > 0

    def set_spike(self) -> None:
        """Make the next delivery carry a spike."""
        with self.lock:
            self.spike_pending = True

    def set_environment(
        self, temperature_C: object | None = None, pressure_kPa: object | None = None
    ) -> dict[str, float]:
        """Change the air temperature (°C) and/or pressure (kPa); return both."""
        with self.lock:
            if temperature_C is not None:
                self.temperature_C = check_number(
                    "temperature_C", temperature_C, *TEMPERATURE_LIMITS_C, "°C"
                )
            if pressure_kPa is not None:
                self.pressure_kPa = check_number(
                    "pressure_kPa", pressure_kPa, *PRESSURE_LIMITS_kPa, "kPa"
                )
            return self.environment()

    def environment(self) -> dict[str, float]:
        """Return what the bench thermometer and barometer read."""
        with self.lock:
            return {"temperature_C": self.temperature_C, "pressure_kPa": self.pressure_kPa}

    def truth(self, biases_V: list[float] | None = None) -> dict[str, object]:
        """Return the true factors the physics used (see ChamberPhysics.truth)."""
        with self.lock:
            return self.physics.truth(self.temperature_C, self.pressure_kPa, self.bias_V, biases_V)

    def state(self) -> dict[str, object]:
        """Return the instrument's state as plain data."""
        with self.lock:
            self._advance()
            return {
                "integrating": self.integrating,
                "charge_nC": self.charge_nC,
                "bias_V": self.bias_V,
                "range": RANGES[self.range_index][0],
                "beam_on": self._delivery is not None,
                "total_MU": self.total_mu,
                "MU_since_change": self.mu_since_change
                if math.isfinite(self.mu_since_change)
                else None,
                "deliveries_completed": self.deliveries_completed,
                "last_delivery": self.last_delivery,
                "spike_pending": self.spike_pending,
                "time_scale": self.time_scale,
                **self.environment(),
            }
