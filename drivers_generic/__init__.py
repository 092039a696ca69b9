"""The instrument layer: transports, profile-driven drivers, the simulated electrometer.

The daemon needs two functions from here:

``open_electrometer(profile, port=..., resource=..., traffic=..., clock=...)``
    Load a profile (a shipped name such as ``query-plain``, or a path to a ``.toml`` file), build
    the driver on a serial port (``port``) or a VISA resource (``resource``), open it and return it.
``reconnect(electrometer, attempts, backoff_s)``
    After InstrumentDisconnected, re-open with a growing pause between attempts.

This module imports neither pyserial nor pyvisa: they are imported when a port is opened.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path

from chargebook.drivers_generic.driver import ProfileElectrometer
from chargebook.drivers_generic.interface import (
    Electrometer,
    InstrumentDisconnected,
    SettingOutOfRange,
    TrafficListener,
)
from chargebook.drivers_generic.profile import (
    Profile,
    ProfileError,
    available_profiles,
    load_profile,
)
from chargebook.drivers_generic.transport import Transport

__all__ = [
    "Profile",
    "ProfileElectrometer",
    "ProfileError",
    "available_profiles",
    "build_electrometer",
    "load_profile",
    "open_electrometer",
    "reconnect",
]

#: The longest pause between two reconnection attempts, in seconds.
MAX_BACKOFF_s = 30.0


def build_transport(
    profile: Profile,
    *,
    port: str | None = None,
    resource: str | None = None,
    traffic: TrafficListener | None = None,
    clock: Callable[[], float] = time.monotonic,
    visa_library: str | None = None,
) -> Transport:
    """Return an unopened transport: pyserial on ``port`` or pyvisa on ``resource`` (with
    ``visa_library``, else $PYVISA_LIBRARY, else ``@py``)."""
    if (port is None) == (resource is None):
        raise SettingOutOfRange(
            "port/resource", (port, resource), "exactly one of a serial port or a VISA resource"
        )
    if port is not None:
        from chargebook.drivers_generic.serial_transport import SerialTransport

        return SerialTransport(
            port,
            profile.port,
            profile.framing,
            write_timeout_s=profile.timing.timeout_s,
            traffic=traffic,
            clock=clock,
        )
    from chargebook.drivers_generic.visa_transport import VisaTransport

    return VisaTransport(
        resource,
        profile.framing,
        settings=profile.port,
        visa_library=visa_library,
        traffic=traffic,
        clock=clock,
    )


def build_electrometer(
    profile: str | Path | Profile,
    *,
    port: str | None = None,
    resource: str | None = None,
    traffic: TrafficListener | None = None,
    clock: Callable[[], float] = time.monotonic,
    visa_library: str | None = None,
) -> ProfileElectrometer:
    """Return the driver for ``profile`` on ``port`` or ``resource``, not yet opened."""
    loaded = profile if isinstance(profile, Profile) else load_profile(profile)
    transport = build_transport(
        loaded,
        port=port,
        resource=resource,
        traffic=traffic,
        clock=clock,
        visa_library=visa_library,
    )
    return ProfileElectrometer(loaded, transport, clock=clock)


def open_electrometer(
    profile: str | Path | Profile,
    *,
    port: str | None = None,
    resource: str | None = None,
    traffic: TrafficListener | None = None,
    clock: Callable[[], float] = time.monotonic,
    visa_library: str | None = None,
) -> Electrometer:
    """Return the driver for ``profile`` on ``port`` or ``resource``, opened.

    Raises ProfileError for a bad profile, SettingOutOfRange unless exactly one of ``port`` and
    ``resource`` is given, InstrumentDisconnected when the port is not there. After a later
    InstrumentDisconnected, call ``open()`` again, or :func:`reconnect`.
    """
    electrometer = build_electrometer(
        profile,
        port=port,
        resource=resource,
        traffic=traffic,
        clock=clock,
        visa_library=visa_library,
    )
    electrometer.open()
    return electrometer


def reconnect(
    electrometer: Electrometer,
    attempts: int = 10,
    backoff_s: float = 0.1,
    *,
    sleep: Callable[[float], None] = time.sleep,
) -> int:
    """Re-open ``electrometer``; return the number of attempts it took.

    The pause after the k-th failed attempt is ``backoff_s * 2**(k-1)`` seconds, at most
    MAX_BACKOFF_s. Raises the last InstrumentDisconnected when every attempt failed.
    """
    if attempts < 1:
        raise SettingOutOfRange("attempts", attempts, "1 or more")
    for attempt in range(1, attempts + 1):
        try:
            electrometer.open()
            return attempt
        except InstrumentDisconnected:
            if attempt == attempts:
                raise
            sleep(min(backoff_s * 2 ** (attempt - 1), MAX_BACKOFF_s))
    raise AssertionError("unreachable")
