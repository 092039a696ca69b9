"""The simulated thermometer-barometer: the far end of a sensor profile's wire.

It reads the simulated world's air (the electrometer's ``temperature_C`` and ``pressure_kPa``,
which the bench sets) as a real instrument would: with a small fixed error of its own, which
the certificate correction in the station's registers puts right (the demo's registers hold
it). It answers its profile's identity and quantity queries, or, in push mode, writes each
quantity in turn about once a second.
"""

from __future__ import annotations

import time
from typing import Protocol

from chargebook.drivers_generic.sensor import SensorProfile, in_unit

#: The simulated sensor's serial, as the demo's registers know it.
SENSOR_SERIAL = "SIM-TP-0001"
SENSOR_MODEL = "sensor-sim"
#: The simulated sensor's own error: it reads this much above the true air (°C, kPa).
TEMPERATURE_ERROR_C = -0.10
PRESSURE_ERROR_KPA = 0.05
PUSH_INTERVAL_s = 1.0


class Air(Protocol):
    """The simulated world's air, as the electrometer simulator keeps it."""

    temperature_C: float
    pressure_kPa: float


class SensorResponder:
    """Answers a sensor profile's queries from the simulated air (a pty's responder)."""

    def __init__(self, profile: SensorProfile, air: Air, serial: str = SENSOR_SERIAL) -> None:
        self.profile = profile
        self.air = air
        self.serial = serial
        self._next_push_s = 0.0
        self._push_index = 0

    def _line(self, quantity: str) -> str:
        spec = next(q for q in self.profile.quantities if q.name == quantity)
        unit = spec.format.split()[-1]
        true = {
            "temperature": self.air.temperature_C + TEMPERATURE_ERROR_C,
            "pressure": self.air.pressure_kPa + PRESSURE_ERROR_KPA,
        }[quantity]
        return spec.format.format(value=in_unit(true, unit))

    def respond(self, line: str) -> list[str]:
        """Return the answer to one query (nothing for a line it does not know)."""
        text = line.strip()
        if text == self.profile.identity_query:
            return [self.profile.identity_format.format(model=SENSOR_MODEL, serial=self.serial)]
        for spec in self.profile.quantities:
            if text == spec.query:
                return [self._line(spec.name)]
        return []

    def tick(self) -> list[str]:
        """Return the next quantity's line in push mode, about once a second."""
        if self.profile.mode != "push" or time.monotonic() < self._next_push_s:
            return []
        self._next_push_s = time.monotonic() + PUSH_INTERVAL_s / len(self.profile.quantities)
        spec = self.profile.quantities[self._push_index % len(self.profile.quantities)]
        self._push_index += 1
        return [self._line(spec.name)]

    def flood_line(self, index: int) -> str:
        """Return one line of the first quantity (a flood is the electrometer's, not ours)."""
        return self._line(self.profile.quantities[0].name)
