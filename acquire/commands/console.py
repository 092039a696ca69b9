"""`chargebook console`: attach the operator console to a running daemon."""

from __future__ import annotations

import argparse

HELP = "open the operator console on a running daemon (closing it never stops a measurement)"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Add ``--socket`` and ``--operator`` to the ``console`` subcommand."""
    parser.add_argument(
        "--socket",
        metavar="PATH",
        help="the daemon's control socket (default: the daemon's default socket path)",
    )
    parser.add_argument(
        "--watch",
        action="store_true",
        help="watch only: attach to the watch-only socket beside the control socket "
        "(watch.sock); everything is shown, no action is offered (e.g. from another room, over "
        "ssh station -t chargebook console --watch)",
    )
    parser.add_argument(
        "--operator",
        metavar="NAME",
        help="your name, written in the audit log for every action you take",
    )


def run(args: argparse.Namespace) -> int:
    """Run the console until the operator quits; return the exit status."""
    from pathlib import Path

    from chargebook.acquire.protocol import WATCH_SOCKET_NAME, default_socket_path
    from chargebook.tui.app import run_console

    socket = Path(args.socket or default_socket_path())
    if args.watch:
        return run_console(socket.parent / WATCH_SOCKET_NAME, watch=True)
    return run_console(socket, operator=args.operator)
