"""`chargebook replay SESSION`: replay a recorded session and say whether it reproduces.

See ``chargebook.acquire.replay.session_replay`` for how. ``--write-traffic-log FILE`` only
writes the session's recorded traffic as a JSON-lines log, which ``--traffic-log FILE`` plays back.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from chargebook.acquire.commands.station_reader import add_db_argument, add_session_argument

HELP = (
    "replay a recorded session's raw instrument traffic through the simulated electrometer, "
    "the driver and the engine into a new session; check that it reproduces exactly, or ask "
    "what another plan or other thresholds would have given"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the replay's options."""
    add_session_argument(parser)
    add_db_argument(parser)
    parser.add_argument(
        "--speed",
        type=float,
        default=1.0,
        metavar="X",
        help="pace of the replay against the recorded pace: 1 as recorded (default), "
        "2 twice as fast, 0 as fast as the pipeline allows",
    )
    parser.add_argument(
        "--plan",
        metavar="P",
        help="what if: replay with this plan (a shipped name or a .toml file) instead of the "
        "session's own",
    )
    parser.add_argument(
        "--thresholds",
        metavar="FILE",
        type=Path,
        help="what if: stability thresholds from a TOML file of Thresholds fields, laid over "
        "the session's own",
    )
    parser.add_argument(
        "--threshold",
        metavar="NAME=VALUE",
        action="append",
        default=[],
        help="what if: one stability threshold (e.g. relative_sd_pct=0.1); may be repeated",
    )
    parser.add_argument(
        "--traffic-log",
        metavar="FILE",
        type=Path,
        help="play this JSON-lines traffic log ({t_s, dir, line} per line) in place of the "
        "traffic stored with the session, e.g. a copy kept elsewhere",
    )
    parser.add_argument(
        "--write-traffic-log",
        metavar="FILE",
        type=Path,
        help="write the session's recorded traffic to FILE as such a log, and replay nothing",
    )
    parser.add_argument(
        "--profile", help="instrument profile, if the session does not name a loadable one"
    )
    parser.add_argument(
        "--time-scale",
        type=float,
        metavar="X",
        help="the daemon's --time-scale, if the session does not record it",
    )
    parser.add_argument("--dry-run", action="store_true", help="compare only: write no new session")
    parser.add_argument(
        "--keep",
        action="store_true",
        help="store the replay of a --traffic-log that does not reproduce the session all the "
        "same, marked as not reproduced (without it, such a replay is compared, not stored)",
    )
    parser.add_argument("--json", action="store_true", help="print one JSON object")


def threshold_values(args: argparse.Namespace) -> dict[str, object]:
    """Return the threshold overrides from --thresholds FILE and --threshold NAME=VALUE.

    Raises InputError naming the option for a file that cannot be read or a value that is
    not NAME=NUMBER; unknown names are refused when the thresholds are built.
    """
    import tomllib

    from chargebook.corrections.errors import InputError

    values: dict[str, object] = {}
    if args.thresholds is not None:
        try:
            values.update(tomllib.loads(args.thresholds.read_text(encoding="utf-8")))
        except (OSError, ValueError) as error:
            raise InputError(
                "--thresholds", str(args.thresholds), "a readable TOML file", str(error)
            ) from None
    for item in args.threshold:
        name, _, text = item.partition("=")
        try:
            values[name.strip()] = tomllib.loads(f"value = {text.strip()}")["value"]
        except ValueError:
            raise InputError(
                "--threshold", item, "NAME=VALUE, e.g. relative_sd_pct=0.1", "cannot be read"
            ) from None
    return values


def run(args: argparse.Namespace) -> int:
    """Replay the session; print the verdict; return 0 when it reproduced (or a what-if ran),
    1 when an unchanged replay did not reproduce or failed, 2 for input that cannot be used."""
    import json
    import os
    import sys

    from chargebook.acquire.commands.station_reader import listed_hint, missing_station_words
    from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
    from chargebook.acquire.processes import ChildStartError
    from chargebook.acquire.protocol import CAUTION
    from chargebook.acquire.record.store import NotFound, StoreError, default_db_path
    from chargebook.acquire.replay.session_replay import (
        Divergence,
        NotReplayable,
        ReplayRequest,
        replay_session,
        save_traffic_log,
    )
    from chargebook.acquire.replay.text import replay_text
    from chargebook.corrections.errors import InputError
    from chargebook.drivers_generic import ProfileError

    db_path = Path(args.db or default_db_path())
    if not db_path.is_file():  # the input cannot be used: status 2, as for every command
        print(f"chargebook replay: {missing_station_words(db_path)}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    try:
        if args.write_traffic_log is not None:
            count = save_traffic_log(db_path, args.session, args.write_traffic_log, args.profile)
            print(
                f"wrote {args.write_traffic_log}: {count} lines of session {args.session}",
                file=sys.stderr,
            )
            return EXIT_OK
        if not args.speed >= 0:
            raise InputError("--speed", args.speed, "0 (as fast as possible) or more")
        if args.time_scale is not None and not args.time_scale > 0:
            raise InputError("--time-scale", args.time_scale, "a number above 0")
        request = ReplayRequest(
            db_path=db_path,
            session_id=args.session,
            speed=args.speed,
            plan=args.plan,
            thresholds=threshold_values(args),
            traffic_log=args.traffic_log,
            profile=args.profile,
            time_scale=args.time_scale,
            dry_run=args.dry_run,
            keep=args.keep,
        )
        report = replay_session(request)
    except NotFound as error:
        print(f"chargebook replay: {error}{listed_hint(error)}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except (NotReplayable, InputError, ProfileError) as error:
        print(f"chargebook replay: {error}; nothing was written", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except Divergence as error:
        print(
            f"chargebook replay: session {args.session} was NOT reproduced: {error}; "
            "nothing was written",
            file=sys.stderr,
        )
        return EXIT_FAILURE
    except (StoreError, ChildStartError, OSError) as error:
        print(f"chargebook replay: {error}", file=sys.stderr)
        return EXIT_FAILURE
    try:
        if args.json:
            print(json.dumps(report.to_dict(), indent=2, ensure_ascii=False, default=str))
        else:
            print(replay_text(report))
            print()
            print(CAUTION)
    except BrokenPipeError:  # whoever read the output went away (`| head`): stop quietly
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
    return EXIT_OK if report.reproduced or report.what_if else EXIT_FAILURE
