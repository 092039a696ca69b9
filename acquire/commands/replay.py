"""`chargebook replay SESSION...`: replay recorded sessions and say whether each reproduces.

See ``chargebook.acquire.replay.session_replay`` for how. Several sessions, or a calibration
visit's (``--visit ID``), are replayed one after another in this one process, each in its own
transaction. ``--write-traffic-log FILE`` only writes one session's recorded traffic as a
JSON-lines log, which ``--traffic-log FILE`` plays back.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from chargebook.acquire.commands.station_reader import add_db_argument

TYPE_CHECKING = False  # not typing's: `chargebook --help` imports no typing (DEVELOPERS.md)
if TYPE_CHECKING:
    from collections.abc import Callable

    from chargebook.acquire.replay.outcome import Outcome
    from chargebook.acquire.replay.session_replay import StationReplays

HELP = (
    "replay a recorded session's raw instrument traffic through the simulated electrometer, "
    "the driver and the engine into a new session; check that it reproduces exactly, or ask "
    "what another plan or other thresholds would have given; several sessions, or a "
    "calibration visit's (--visit), in one run"
)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the replay's options."""
    parser.add_argument(
        "session",
        metavar="SESSION",
        type=int,
        nargs="*",
        help="session id; several are replayed one after another, each stored on its own",
    )
    parser.add_argument(
        "--visit",
        metavar="ID",
        type=int,
        help="replay every session of this calibration visit, in the order they were measured",
    )
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
    """Replay the sessions asked for; print each verdict; return 0 when each reproduced (or each
    what-if ran), 1 when one did not reproduce or failed, 2 for input that cannot be used."""
    import functools
    import sys

    from chargebook.acquire.commands.station_reader import listed_hint, missing_station_words
    from chargebook.acquire.exit_codes import EXIT_INVALID_INPUT, EXIT_OK
    from chargebook.acquire.record.store import NotFound, default_db_path
    from chargebook.acquire.replay.session_replay import (
        NotReplayable,
        StationReplays,
        save_traffic_log,
    )
    from chargebook.corrections.errors import InputError
    from chargebook.drivers_generic import ProfileError

    db_path = Path(args.db or default_db_path())
    if not db_path.is_file():  # the input cannot be used: status 2, as for every command
        print(f"chargebook replay: {missing_station_words(db_path)}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    try:
        sessions = _session_ids(args, db_path)
        if args.write_traffic_log is not None:
            count = save_traffic_log(db_path, sessions[0], args.write_traffic_log, args.profile)
            print(
                f"wrote {args.write_traffic_log}: {count} lines of session {sessions[0]}",
                file=sys.stderr,
            )
            return EXIT_OK
        if not args.speed >= 0:
            raise InputError("--speed", args.speed, "0 (as fast as possible) or more")
        if args.time_scale is not None and not args.time_scale > 0:
            raise InputError("--time-scale", args.time_scale, "a number above 0")
        thresholds = threshold_values(args)
        _check_what_every_replay_uses(args, thresholds)
    except NotFound as error:
        print(f"chargebook replay: {error}{listed_hint(error)}", file=sys.stderr)
        return EXIT_INVALID_INPUT
    except (NotReplayable, InputError, ProfileError) as error:
        print(f"chargebook replay: {error}; nothing was written", file=sys.stderr)
        return EXIT_INVALID_INPUT
    with StationReplays(db_path) as replays:  # the file opened once for every session
        if not args.dry_run and len(sessions) > 1:
            try:  # a daemon holding the file stops every replay: said once, not per session
                replays.station()
            except NotReplayable as error:
                print(f"chargebook replay: {error}; nothing was written", file=sys.stderr)
                return EXIT_INVALID_INPUT
        if len(args.session) == 1 and args.visit is None:
            outcome = _replay_one(args, replays, sessions[0], thresholds)
            _print(lambda: _print_one(outcome, args.json))
            return outcome.status
        outcomes = []
        for session_id in sessions:  # each in its own transaction; one that fails stops none
            outcome = _replay_one(args, replays, session_id, thresholds)
            outcomes.append(outcome)
            if not args.json:
                _print(functools.partial(_print_one, outcome, False, caution=False))
    _print(lambda: _print_many(outcomes, args))
    return max(outcome.status for outcome in outcomes)


def _check_what_every_replay_uses(args: argparse.Namespace, thresholds: dict[str, object]) -> None:
    """Raise InputError or ProfileError, once, for a --plan, --profile or threshold that no
    replay could use, before any session is replayed (each would refuse it in the same words)."""
    from chargebook.acquire.session import rules
    from chargebook.drivers_generic import load_profile

    if args.plan is not None:
        rules.resolve_plan(args.plan)
    if args.profile is not None:
        load_profile(args.profile)
    rules.thresholds_from_dict(thresholds)  # the names and values, over the defaults


def _session_ids(args: argparse.Namespace, db_path: Path) -> list[int]:
    """Return the ids of the sessions to replay: those given, or the visit's.

    Raises InputError for none, both, a visit with no session, or several sessions with an
    option that takes one; NotFound for a visit that does not exist."""
    from chargebook.acquire.record.store import Store
    from chargebook.acquire.record.visits import visit_session_ids
    from chargebook.corrections.errors import InputError

    if args.visit is None and not args.session:
        raise InputError("SESSION", None, "a session id (or several), or --visit ID", "is missing")
    if args.visit is not None and args.session:
        raise InputError(
            "--visit", args.visit, "session ids or --visit ID, not both", "is given with sessions"
        )
    sessions = list(dict.fromkeys(args.session))  # each once, in the order given
    if args.visit is not None:
        with Store.open(db_path, read_only=True) as store:
            sessions = visit_session_ids(store, args.visit)
        if not sessions:
            raise InputError("--visit", args.visit, "a visit with a session", "measured no beam")
    for option, value in (
        ("--traffic-log", args.traffic_log),
        ("--write-traffic-log", args.write_traffic_log),
    ):
        if value is not None and (len(sessions) > 1 or args.visit is not None):
            raise InputError(option, str(value), "one SESSION", f"is given for {len(sessions)}")
    return sessions


def _replay_one(
    args: argparse.Namespace,
    replays: StationReplays,
    session_id: int,
    thresholds: dict[str, object],
) -> Outcome:
    """Replay one session as the options ask; return how it went (never raises for a replay
    that cannot run: the outcome says why, in the words printed on stderr)."""
    from chargebook.acquire.commands.station_reader import listed_hint
    from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_INVALID_INPUT, EXIT_OK
    from chargebook.acquire.processes import ChildStartError
    from chargebook.acquire.record.store import NotFound, StoreError
    from chargebook.acquire.replay.outcome import Outcome
    from chargebook.acquire.replay.session_replay import (
        Divergence,
        NotReplayable,
        ReplayRequest,
    )
    from chargebook.corrections.errors import InputError
    from chargebook.drivers_generic import ProfileError

    options = ("speed", "plan", "traffic_log", "profile", "time_scale", "dry_run", "keep")
    request = ReplayRequest(
        replays.db_path,
        session_id,
        thresholds=thresholds,
        **{name: getattr(args, name) for name in options},
    )
    try:
        report = replays.replay(request)
    except NotFound as error:
        return Outcome(session_id, EXIT_INVALID_INPUT, error=f"{error}{listed_hint(error)}")
    except (NotReplayable, InputError, ProfileError) as error:
        return Outcome(session_id, EXIT_INVALID_INPUT, error=f"{error}; nothing was written")
    except Divergence as error:
        words = f"session {session_id} was NOT reproduced: {error}; nothing was written"
        return Outcome(session_id, EXIT_FAILURE, error=words)
    except (StoreError, ChildStartError, OSError) as error:
        return Outcome(session_id, EXIT_FAILURE, error=str(error))
    status = EXIT_OK if report.reproduced or report.what_if else EXIT_FAILURE
    return Outcome(session_id, status, report=report)


def _print(show: Callable[[], None]) -> None:
    """Run ``show``; whoever read the output going away (`| head`) stops no replay."""
    from chargebook.acquire.commands.station_reader import output_closed

    try:
        show()
    except BrokenPipeError:
        output_closed()


def _print_one(outcome: Outcome, as_json: bool, *, caution: bool = True) -> None:
    """Print one session's report (its error on stderr), with the caution when asked."""
    import json
    import sys

    from chargebook.acquire.protocol import CAUTION
    from chargebook.acquire.replay.text import replay_text

    if outcome.report is None:
        print(f"chargebook replay: {outcome.error}", file=sys.stderr)
    elif as_json:
        print(json.dumps(outcome.report.to_dict(), indent=2, ensure_ascii=False, default=str))
    else:
        print(replay_text(outcome.report))
        print()
        if caution:
            print(CAUTION)


def _print_many(outcomes: list[Outcome], args: argparse.Namespace) -> None:
    """Print what several replays came to: one JSON object, or a closing line and the caution."""
    import json

    from chargebook.acquire.protocol import CAUTION

    reproduced = sum(o.report is not None and o.report.reproduced for o in outcomes)
    ran = sum(o.report is not None for o in outcomes)
    if args.json:
        data = {
            "visit_id": args.visit,
            "sessions": [outcome.to_dict() for outcome in outcomes],
            "replayed": ran,
            "reproduced": all(o.report is not None and o.report.reproduced for o in outcomes),
        }
        print(json.dumps(data, indent=2, ensure_ascii=False, default=str))
        return
    what = f"visit {args.visit}" if args.visit is not None else "the sessions given"
    failed = [str(o.session_id) for o in outcomes if o.status != 0]
    lines = [
        f"{what}: {len(outcomes)} session(s), {ran} replayed, {reproduced} reproduced exactly"
        + (f"; not reproduced or not run: session(s) {', '.join(failed)}" if failed else "")
    ]
    print("\n".join(lines))
    print()
    print(CAUTION)
