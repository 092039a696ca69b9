"""`chargebook run --unattended`: the engine with the automatic operator, in one process."""

from __future__ import annotations

import argparse

from chargebook.acquire.commands.serve import add_instrument_arguments

#: The units the air pressure may be given in, as the worksheet and the console's form take them.
PRESSURE_OPTION_UNITS = ("kPa", "hPa", "mmHg")

HELP = "take a whole plan through unattended (automatic operator) and print the session result"


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the instrument options (as `serve`) and the unattended run's own."""
    add_instrument_arguments(parser)
    parser.add_argument(
        "--unattended",
        action="store_true",
        help="required: accept every prompt automatically (an attended run uses serve + console)",
    )
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument(
        "--metadata",
        metavar="FILE",
        help="session metadata, a .json or .toml file (required unless --bench-control is "
        "given, when the invented demo metadata is used)",
    )
    parser.add_argument("--temperature-C", type=float, help="air temperature to enter, °C")
    pressure = parser.add_mutually_exclusive_group()
    for unit in PRESSURE_OPTION_UNITS:
        pressure.add_argument(
            f"--pressure-{unit}",
            type=float,
            dest=f"pressure_{unit}",
            help=f"air pressure to enter, {unit} (converted once to kPa, and recorded)",
        )


def load_metadata(path: str) -> dict:
    """Return session metadata from a JSON or TOML file; InputError naming the file if unusable."""
    import json
    import tomllib
    from pathlib import Path

    from chargebook.corrections.errors import InputError

    source = Path(path)
    try:
        text = source.read_text(encoding="utf-8")
        data = tomllib.loads(text) if source.suffix == ".toml" else json.loads(text)
    except (OSError, ValueError) as error:
        raise InputError("--metadata", path, "a readable .json or .toml file", str(error)) from None
    if not isinstance(data, dict):
        raise InputError("--metadata", path, "a table of session details", "is not a table")
    return data


def run(args: argparse.Namespace) -> int:
    """Run the plan unattended; print the result; return 0, 2 on invalid input, 1 on failure."""
    import asyncio
    import sys

    from chargebook.acquire.client import DaemonError
    from chargebook.acquire.daemon.main import startup_errors
    from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT
    from chargebook.corrections.errors import InputError

    if not args.unattended:
        print(
            "chargebook run: only --unattended runs exist; for an attended session start "
            "'chargebook serve' and 'chargebook console'",
            file=sys.stderr,
        )
        return EXIT_INVALID_INPUT
    try:
        return asyncio.run(_run(args))
    except (InputError, *startup_errors()) as error:
        print(f"chargebook run: {error}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except DaemonError as error:
        print(f"chargebook run: the daemon refused: {error}", file=sys.stderr)
        return daemon_error_status(error)


def daemon_error_status(error: Exception) -> int:
    """Return 2 when the daemon refused a value the operator gave (input, params), else 1.

    ``error`` is a DaemonError or an AutoOperatorError (its ``code`` None when no request was
    refused).
    """
    from chargebook.acquire import protocol
    from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT

    refused_input = (protocol.INPUT_ERROR, protocol.INVALID_PARAMS)
    return EXIT_INVALID_INPUT if getattr(error, "code", None) in refused_input else EXIT_FAILURE


async def _run(args: argparse.Namespace) -> int:
    import asyncio
    import json
    import logging
    import sys
    import tempfile
    from pathlib import Path

    from chargebook.acquire.client import DaemonClient
    from chargebook.acquire.commands.demo_data import demo_metadata
    from chargebook.acquire.commands.operator_auto import ACTOR, AutoOperator, AutoOperatorError
    from chargebook.acquire.daemon.daemon import Daemon
    from chargebook.acquire.daemon.main import options_from_args
    from chargebook.acquire.exit_codes import EXIT_OK
    from chargebook.acquire.reports.summary_text import reading_line, result_table
    from chargebook.acquire.session.result import result_document
    from chargebook.corrections.errors import InputError

    logging.basicConfig(level=args.log_level, stream=sys.stderr)
    if args.metadata:
        metadata = load_metadata(args.metadata)
    elif args.bench_control:
        metadata = demo_metadata()
    else:
        raise InputError("--metadata", None, "a metadata file for a real instrument", "is missing")
    environment = environment_source(args)
    with tempfile.TemporaryDirectory(prefix="chargebook-run-") as private:
        options = options_from_args(args, Path(private) / "daemon.sock")
        daemon = Daemon(options)
        ready = asyncio.get_running_loop().create_future()
        serving = asyncio.create_task(daemon.run(lambda info: ready.set_result(info)))
        await asyncio.wait({serving, ready}, return_when=asyncio.FIRST_COMPLETED)
        if serving.done():
            serving.result()  # raises why the daemon could not start
        client = await DaemonClient.connect(options.socket_path, client="run", operator=ACTOR)

        def progress(reading_set: dict, reading: dict) -> None:
            if not args.json:
                print(reading_line(reading_set, reading), file=sys.stderr, flush=True)

        try:
            final = await AutoOperator(client, environment, on_reading=progress).run(metadata)
            assert daemon.store is not None
            document = result_document(daemon.store, final["session"]["id"])
        except AutoOperatorError as error:
            print(f"chargebook run: {error}", file=sys.stderr)
            return daemon_error_status(error)
        finally:
            await client.close()
            daemon.shutdown()
            await serving
    if args.json:
        print(json.dumps(document, indent=2, ensure_ascii=False))
    else:
        print(result_table(document))
    return EXIT_OK


def environment_source(args: argparse.Namespace):
    """Return a callable giving the Environment to enter: the options given, else the bench."""
    from chargebook.acquire.commands.operator_auto import Environment, environment_from_bench
    from chargebook.corrections.errors import InputError

    given = [(getattr(args, f"pressure_{unit}"), unit) for unit in PRESSURE_OPTION_UNITS]
    pressure, unit = next(((value, unit) for value, unit in given if value is not None), (None, ""))
    if args.temperature_C is not None and pressure is not None:
        check_given_environment(args.temperature_C, pressure, unit)
        fixed = Environment(args.temperature_C, pressure, "entered for the run", unit)
        return lambda: fixed
    if args.bench_control:
        return environment_from_bench(args.bench_control)
    raise InputError(
        "--temperature-C/--pressure-kPa (or --pressure-hPa, --pressure-mmHg)",
        None,
        "both, or --bench-control",
        "are missing",
    )


def check_given_environment(temperature_C: float, pressure: float, unit: str) -> None:
    """Refuse, before any session starts, what the daemon would refuse (°C; pressure in ``unit``).

    The checks are the daemon's own (``rules.check_environment``); the InputError names the
    option the value came in (``--temperature-C``, ``--pressure-hPa``).
    """
    from chargebook.acquire.session.rules import check_environment
    from chargebook.corrections.errors import InputError

    options = {"temperature_C": "--temperature-C", "pressure": f"--pressure-{unit}"}
    try:
        check_environment(temperature_C, pressure, unit)
    except InputError as error:
        field = options.get(error.field, error.field)
        raise InputError(field, error.value, error.allowed, error.problem) from None
