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
        "--operator",
        metavar="NAME",
        help="your name, written in the audit log for every action you take",
    )


def run(args: argparse.Namespace) -> int:
    """Run the console until the operator quits; return the exit status."""
    from chargebook.acquire.protocol import default_socket_path
    from chargebook.tui.app import run_console

    return run_console(args.socket or default_socket_path(), operator=args.operator)
