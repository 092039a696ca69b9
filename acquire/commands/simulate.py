"""`chargebook simulate`: run the simulated electrometer as a process of its own."""

from __future__ import annotations

import argparse
from pathlib import Path

HELP = "run the simulated electrometer on a pseudo-terminal and/or a loopback SCPI socket"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the simulator's options."""
    parser.add_argument(
        "--serial",
        action="store_true",
        help="serve the profile's dialect on a pseudo-terminal (default unless --scpi is given)",
    )
    parser.add_argument(
        "--scpi",
        type=int,
        metavar="PORT",
        help="serve SCPI on 127.0.0.1:PORT (0 picks a free port)",
    )
    parser.add_argument(
        "--profile",
        default="query-plain",
        help="the dialect spoken on the pty (default query-plain)",
    )
    parser.add_argument("--seed", type=int, default=1, help="seed of the noise (default 1)")
    parser.add_argument(
        "--time-scale",
        type=float,
        default=1.0,
        metavar="X",
        help="wall seconds per simulated second (0.01 runs 100x faster; default 1)",
    )
    parser.add_argument("--temperature-C", type=float, default=21.5, help="air temperature, °C")
    parser.add_argument("--pressure-kPa", type=float, default=100.8, help="air pressure, kPa")
    parser.add_argument("--bias-V", type=float, default=300.0, help="initial chamber bias, V")
    parser.add_argument(
        "--beam", choices=("pulsed", "continuous"), default="pulsed", help="beam kind"
    )
    parser.add_argument(
        "--playback", type=Path, metavar="LOG", help="play back a JSON-lines traffic log"
    )
    parser.add_argument(
        "--speed",
        type=float,
        default=1.0,
        metavar="X",
        help="playback speed factor (2 = twice as fast, 0 = as fast as possible)",
    )


def run(args: argparse.Namespace) -> int:
    """Run the simulator until SIGTERM or SIGINT; return the exit status."""
    import sys

    from chargebook.drivers_generic.profile import ProfileError
    from chargebook.drivers_generic.simulator.app import SimulatorOptions, run_simulator
    from chargebook.drivers_generic.simulator.device import SimulatorInputError

    options = SimulatorOptions(
        serial=args.serial or args.scpi is None,
        scpi_port=args.scpi,
        profile=args.profile,
        seed=args.seed,
        time_scale=args.time_scale,
        temperature_C=args.temperature_C,
        pressure_kPa=args.pressure_kPa,
        beam=args.beam,
        bias_V=args.bias_V,
        playback=args.playback,
        speed=args.speed,
    )
    try:
        return run_simulator(options)
    except (ProfileError, SimulatorInputError, OSError, ValueError) as error:
        print(f"chargebook simulate: {error}", file=sys.stderr)
        return 2
