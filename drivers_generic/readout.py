"""Read a few captures through a driver and print them: the quickest check of a wire.

    python -m chargebook.drivers_generic.readout --profile query-plain \\
        --port /tmp/chargebook-sim-XXXX/electrometer --bench /tmp/chargebook-sim-XXXX/control.sock

Each capture zeroes the integrator, starts it, has the beam delivered, and takes the reading:
the instrument's completed reading in push mode, or a query after stopping in query mode. With
``--bench`` (the simulated electrometer's control socket) the simulated linac delivers the beam;
without it, the operator delivers it and presses Enter.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from collections.abc import Callable, Sequence

from chargebook.drivers_generic.interface import (
    Capability,
    Electrometer,
    InstrumentError,
    InstrumentTimeout,
    Sample,
)

#: Deliver the beam; the argument says whether to return only once the beam has ended.
BeamDelivery = Callable[[bool], object]


def capture_reading(
    electrometer: Electrometer, deliver: BeamDelivery, *, timeout_s: float = 30.0
) -> Sample:
    """Return one reading (charge in nC): zero, integrate, deliver the beam, capture."""
    electrometer.zero()
    electrometer.start_integration()
    if Capability.PUSH_READINGS in electrometer.capabilities:
        deliver(False)
        sample = _wait_for_complete(electrometer, timeout_s)
        electrometer.stop_integration()
        return sample
    deliver(True)
    electrometer.stop_integration()
    return electrometer.read_charge()


def _wait_for_complete(electrometer: Electrometer, timeout_s: float) -> Sample:
    deadline = time.monotonic() + timeout_s
    while (remaining := deadline - time.monotonic()) > 0:
        sample = electrometer.next_sample(remaining)
        if sample is not None and sample.complete:
            return sample
    raise InstrumentTimeout(f"no completed reading within {timeout_s} s")


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python -m chargebook.drivers_generic.readout", description=__doc__.split("\n")[0]
    )
    parser.add_argument("--profile", required=True, help="profile name or .toml path")
    wire = parser.add_mutually_exclusive_group(required=True)
    wire.add_argument("--port", help="serial port (or the simulator's pty symlink)")
    wire.add_argument("--resource", help="VISA resource, e.g. TCPIP::127.0.0.1::5025::SOCKET")
    parser.add_argument(
        "--visa-library",
        metavar="LIB",
        help="VISA library for --resource: @py, @ivi or a library's path "
        "(default: $PYVISA_LIBRARY, else @py)",
    )
    parser.add_argument("--bench", help="the simulator's control socket: it delivers the beam")
    parser.add_argument("--count", type=int, default=10, help="captures to take (default 10)")
    parser.add_argument("--mu", type=float, default=100.0, help="MU per capture (default 100)")
    parser.add_argument("--dose-rate", type=float, default=600.0, help="MU/min (default 600)")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Take ``--count`` captures and print them with their mean; return the exit status."""
    from chargebook.drivers_generic import ProfileError, open_electrometer

    args = _parser().parse_args(argv)
    if not 1 <= args.count <= 10000:
        print(f"--count = {args.count} is not allowed; allowed: 1 to 10000", file=sys.stderr)
        return 2
    try:
        electrometer = open_electrometer(
            args.profile,
            port=args.port,
            resource=args.resource,
            visa_library=args.visa_library,
        )
    except (ProfileError, InstrumentError, ValueError) as error:
        print(f"readout: {error}", file=sys.stderr)
        return 2
    deliver, close_bench = _delivery(args)
    try:
        if Capability.IDENTIFY in electrometer.capabilities:
            print(f"instrument: {electrometer.identify().raw}")
        charges = []
        for index in range(1, args.count + 1):
            sample = capture_reading(electrometer, deliver)
            charges.append(sample.charge_nC)
            print(f"{index:3d}  {sample.charge_nC:+12.5f} nC  {sample.status}")
    except InstrumentError as error:
        print(f"readout: {type(error).__name__}: {error}", file=sys.stderr)
        return 1
    except EOFError:
        print("readout: no beam was confirmed (input closed)", file=sys.stderr)
        return 1
    finally:
        electrometer.close()
        close_bench()
    mean = statistics.fmean(charges)
    spread = statistics.stdev(charges) / abs(mean) * 100 if len(charges) > 1 and mean else 0.0
    print(f"mean {mean:+.5f} nC, relative SD {spread:.3f} % over {len(charges)} captures")
    return 0


def _delivery(args: argparse.Namespace) -> tuple[BeamDelivery, Callable[[], None]]:
    if args.bench:
        from chargebook.drivers_generic.simulator.control import SimulatorControl

        bench = SimulatorControl(args.bench)
        return (lambda wait: bench.beam(args.mu, args.dose_rate, wait=wait)), bench.close

    def by_hand(wait: bool) -> None:
        prompt = f"Deliver {args.mu:g} MU"
        if wait:
            input(prompt + ", then press Enter: ")
        else:
            print(prompt + " now.")

    return by_hand, lambda: None


if __name__ == "__main__":
    sys.exit(main())
