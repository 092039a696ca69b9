"""`chargebook demo`: the simulated electrometer, the daemon and the console, in one command."""

from __future__ import annotations

import argparse

HELP = (
    "try chargebook on the simulated electrometer: starts it and the daemon, then opens the "
    "console (or, with --unattended, runs the plan and prints the result beside the truth)"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the demo's options."""
    parser.add_argument(
        "--unattended",
        action="store_true",
        help="no console: the automatic operator runs the plan with a live progress display",
    )
    parser.add_argument("--seed", type=int, default=1, help="the simulator's seed (default 1)")
    parser.add_argument(
        "--profile",
        default="query-plain",
        help="the simulated instrument's dialect (default query-plain)",
    )
    parser.add_argument(
        "--db", metavar="FILE", help="demo database (default <data dir>/chargebook/demo.sqlite)"
    )
    parser.add_argument(
        "--plan",
        default=None,
        help="measurement plan; without it the unattended demo runs a full calibration "
        "(the default plan), then a monthly check carrying its k_pol and k_s",
    )
    parser.add_argument(
        "--time-scale",
        type=float,
        default=0.05,
        metavar="X",
        help="run the simulated world X times real time (default 0.05: 20x faster)",
    )
    parser.add_argument(
        "--json", action="store_true", help="with --unattended: print the result as JSON"
    )


def run(args: argparse.Namespace) -> int:
    """Run the demo; return the exit status."""
    from chargebook.acquire.commands.demo_run import run_demo

    return run_demo(args)
