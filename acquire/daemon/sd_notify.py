"""Telling a service manager (systemd) how the daemon is doing: the sd_notify protocol.

The manager passes a datagram socket in ``$NOTIFY_SOCKET`` (a path, or an abstract socket when
it begins with ``@``); the daemon sends it ``READY=1`` once its control socket listens,
``WATCHDOG=1`` from its loop at half the interval in ``$WATCHDOG_USEC`` (microseconds), and
``STOPPING=1`` when it begins to shut down. Without ``$NOTIFY_SOCKET`` every call does nothing.
The protocol is a few lines of text in one datagram, so no library is needed.
"""

from __future__ import annotations

import logging
import os
import socket

log = logging.getLogger(__name__)

READY = "READY=1"
STOPPING = "STOPPING=1"
WATCHDOG = "WATCHDOG=1"


def notify_address(environ: dict[str, str] | None = None) -> str | bytes | None:
    """Return the address to send notifications to, from ``$NOTIFY_SOCKET``, or None.

    An address beginning with ``@`` names a Linux abstract socket: its first byte becomes NUL.
    """
    value = (os.environ if environ is None else environ).get("NOTIFY_SOCKET")
    if not value:
        return None
    if value.startswith("@"):
        return b"\0" + value[1:].encode()
    return value


def watchdog_interval_s(environ: dict[str, str] | None = None) -> float | None:
    """Return how often to send ``WATCHDOG=1`` in seconds (half of ``$WATCHDOG_USEC``), or None
    when the manager asks for no watchdog (unset, not a number, not positive, or meant for
    another process: ``$WATCHDOG_PID`` names a pid other than ours)."""
    env = os.environ if environ is None else environ
    pid = env.get("WATCHDOG_PID")
    if pid and pid != str(os.getpid()):
        return None
    try:
        usec = int(env.get("WATCHDOG_USEC", ""))
    except ValueError:
        return None
    return usec / 2 / 1_000_000 if usec > 0 else None


def notify(state: str, environ: dict[str, str] | None = None) -> bool:
    """Send ``state`` (e.g. ``READY=1``) to the service manager; return True if it was sent.

    Does nothing when not run under a manager; a failure to send is logged, never raised: the
    daemon's work does not depend on its manager hearing of it.
    """
    address = notify_address(environ)
    if address is None:
        return False
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC) as sock:
            sock.sendto(state.encode(), address)
    except OSError as error:
        log.warning("could not tell the service manager %s: %s", state, error)
        return False
    return True
