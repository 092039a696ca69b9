"""The bench: the simulated world around the electrometer (linac, bias switch, thermometer).

When the daemon runs with ``--bench-control PATH`` (the simulator's control socket), it has the
simulated linac deliver each reading's monitor units and turns the simulated bias switch when
the operator confirms a manual bias change. The automatic operator reads the thermometer and
barometer through it. Without a bench, the operator does these things and says so.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

#: Dose rate the simulated linac delivers at, MU/min (a common setting for photon beams).
DOSE_RATE_MU_PER_MIN = 600.0


class BenchError(RuntimeError):
    """The bench refused or could not be reached; the message says which and why."""


class Bench:
    """A client of the simulated electrometer's control socket, in the trade's words."""

    def __init__(self, control_path: str | Path) -> None:
        from chargebook.drivers_generic.simulator.control import SimulatorControl

        self.path = str(control_path)
        self._control = SimulatorControl(self.path)

    def _request(self, what: str, call: Any) -> dict[str, Any]:
        from chargebook.drivers_generic.simulator.control import SimulatorControlError

        try:
            return call()
        except SimulatorControlError as error:
            raise BenchError(f"the bench refused to {what}: {error}") from error
        except OSError as error:
            raise BenchError(f"the bench at {self.path} cannot {what}: {error}") from error

    def deliver(self, mu: float, *, wait: bool = False) -> dict[str, Any]:
        """Have the simulated linac deliver ``mu`` monitor units (returns once it started)."""
        return self._request(
            f"deliver {mu:g} MU",
            lambda: self._control.beam(mu, DOSE_RATE_MU_PER_MIN, wait=wait),
        )

    def turn_bias(self, volts: float) -> dict[str, Any]:
        """Turn the simulated bias switch to ``volts`` (signed), as an operator's hand would."""
        return self._request(f"set the bias to {volts:+g} V", lambda: self._control.bias(volts))

    def environment(self) -> tuple[float, float]:
        """Return the bench thermometer and barometer: (temperature in °C, pressure in kPa)."""
        reply = self._request("read the environment", self._control.environment)
        return float(reply["temperature_C"]), float(reply["pressure_kPa"])

    def truth(self) -> dict[str, Any]:
        """Return the true factors of the simulated chamber (for the demo's comparison)."""
        return self._request("report its true factors", self._control.truth)

    def close(self) -> None:
        """Close the control connection."""
        self._control.close()
