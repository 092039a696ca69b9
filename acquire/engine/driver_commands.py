"""What the engine asks the daemon to do: one frozen type per command, no field by context.

The engine issues these (:meth:`Engine.take_commands`); the daemon carries them out on the
electrometer or the bench, and a replay sends the electrometer's to the played-back driver.
``action`` names each command as the instrument profiles name it (``zero``, ``start``, ``stop``,
``set_bias``) or, for the bench, as the daemon logs it (``beam``, ``bench_bias``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar


@dataclass(frozen=True, slots=True)
class Zero:
    """Zero (reset) the electrometer's integrated charge before a reading."""

    action: ClassVar[str] = "zero"


@dataclass(frozen=True, slots=True)
class StartIntegration:
    """Start integrating charge."""

    action: ClassVar[str] = "start"


@dataclass(frozen=True, slots=True)
class StopIntegration:
    """Stop integrating charge."""

    action: ClassVar[str] = "stop"


@dataclass(frozen=True, slots=True)
class SetBias:
    """Set the chamber bias remotely to ``bias_V`` (V, signed)."""

    bias_V: float
    action: ClassVar[str] = "set_bias"


@dataclass(frozen=True, slots=True)
class DeliverBeam:
    """Have the bench (the simulated linac) deliver ``monitor_units`` MU."""

    monitor_units: float
    action: ClassVar[str] = "beam"


@dataclass(frozen=True, slots=True)
class TurnBiasSwitch:
    """Have the bench turn the bias switch the operator confirmed to ``bias_V`` (V, signed)."""

    bias_V: float
    action: ClassVar[str] = "bench_bias"


#: Commands for the electrometer (a replay sends these to the played-back driver).
InstrumentCommand = Zero | StartIntegration | StopIntegration | SetBias
#: Commands for the bench, which stands in for the treatment machine and the operator's hand.
BenchCommand = DeliverBeam | TurnBiasSwitch
#: Anything the engine asks the daemon to do.
Command = InstrumentCommand | BenchCommand
#: The bench commands' types, for ``isinstance``.
BENCH_COMMANDS = (DeliverBeam, TurnBiasSwitch)


__all__ = [
    "BENCH_COMMANDS",
    "BenchCommand",
    "Command",
    "DeliverBeam",
    "InstrumentCommand",
    "SetBias",
    "StartIntegration",
    "StopIntegration",
    "TurnBiasSwitch",
    "Zero",
]
