"""`chargebook demo`: the simulated electrometer, the daemon and the console (or the automatic
operator), each a process of its own, with a clean shutdown whatever happens.

The demo has its own database (``<data dir>/chargebook/demo.sqlite`` unless ``--db``), never
the station's record, and invented session metadata (``demo_data``). Unattended and with no
``--plan``, the automatic operator runs a calibration visit of three beams of the invented
DEMO-LA1 (``demo_data.DEMO_VISIT_BEAMS``); with ``--plan``, one session on each plan given,
one after another (``--plan default --plan monthly-check``: a full calibration of the 6 MV beam
the registers name, then an output check carrying its k_pol and k_s).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import json
import os
import shutil
import sys
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any, TextIO

from chargebook.acquire.exit_codes import EXIT_FAILURE, EXIT_OK
from chargebook.acquire.processes import Child, ChildStartError, start_child, stop_child

#: The demo's flow when no --plan is given: a full calibration, then an output check.
FULL_PLAN, CHECK_PLAN = "default", "monthly-check"


@contextlib.contextmanager
def demo_world(args: argparse.Namespace, workdir: Path) -> Iterator[tuple[Child, Child]]:
    """Start the simulator and the daemon on it; stop both on the way out."""
    children: list[Child] = []
    try:
        simulator = start_child(
            "simulated electrometer",
            [
                "simulate", "--serial", "--profile", args.profile, "--seed", str(args.seed),
                "--time-scale", str(args.time_scale),
            ],
            workdir / "simulator.log",
        )  # fmt: skip
        children.append(simulator)
        daemon = start_child(
            "daemon",
            [
                "serve", "--profile", args.profile, "--port", simulator.info["serial"],
                "--bench-control", simulator.info["control"], "--db", str(args.db_path),
                "--socket", str(workdir / "daemon.sock"), "--plan", (args.plan or [FULL_PLAN])[0],
                "--time-scale", str(args.time_scale), "--log-level", "INFO",
                "--config", os.devnull,  # the demo reads no station file
                "--sensor-port", simulator.info["sensor"],  # the air, read by the daemon
            ],
            workdir / "daemon.log",
        )  # fmt: skip
        children.append(daemon)
        yield simulator, daemon
    finally:
        for child in reversed(children):
            stop_child(child.process)


def run_demo(args: argparse.Namespace) -> int:
    """Run the demo as asked; return the exit status."""
    from chargebook.acquire.record.store import default_db_path

    args.db_path = (
        Path(args.db).expanduser() if args.db else default_db_path().with_name("demo.sqlite")
    )
    args.db_path.parent.mkdir(parents=True, exist_ok=True)
    out = sys.stderr if args.json else sys.stdout
    print(f"demo database: {args.db_path}", file=out)
    args.registers = _pick_registers(args.db_path, out)
    workdir = Path(tempfile.mkdtemp(prefix="chargebook-demo-"))
    try:
        with demo_world(args, workdir) as (simulator, daemon):
            socket_path = daemon.info["socket"]
            if not args.unattended:
                status = _open_console(args, socket_path, simulator)
                if status is not None:  # 1 when the console never reached the daemon
                    return status
            return asyncio.run(_unattended(args, socket_path, simulator, out))
    except ChildStartError as error:
        print(f"chargebook demo: {error}", file=sys.stderr)
        return EXIT_FAILURE
    except KeyboardInterrupt:
        print("chargebook demo: stopped; the demo database keeps what was recorded", file=out)
        return 130
    finally:
        shutil.rmtree(workdir, ignore_errors=True)


def _pick_registers(db_path: Path, out: TextIO) -> dict[str, int]:
    """Give the demo database the invented clinic's registers (once), say which beam,
    chamber and certificate the demo uses, and return their row ids (kind -> id)."""
    import datetime

    from chargebook.acquire.commands.demo_data import demo_registers
    from chargebook.acquire.commands.operator_auto import ACTOR
    from chargebook.acquire.record.station_lock import StationLock
    from chargebook.acquire.record.store import Store
    from chargebook.acquire.session.register_rows import select

    with StationLock(db_path), Store.open(db_path) as store:
        ids = demo_registers(store, actor=ACTOR)
        picked = select(store, ids, on=datetime.datetime.now(datetime.UTC).date())
        filled, names = picked.metadata_fields(), picked.names
    print(
        f"registers: beam {names['beam']}, chamber {names['chamber']} (certificate "
        f"{filled.get('certificate', 'none')}, dated {filled.get('calibration_date', '—')}), "
        f"electrometer {names['electrometer']}",
        file=out,
    )
    for warning in picked.warnings():
        print(f"!! {warning}", file=out)
    return ids


def _open_console(args: argparse.Namespace, socket_path: str, simulator: Child) -> int | None:
    """Run the console on the daemon; None when the console is not installed."""
    try:
        from chargebook.tui.app import run_console
    except ImportError:
        return None
    from chargebook.acquire.commands.demo_data import demo_metadata
    from chargebook.acquire.daemon.bench import Bench

    bench = Bench(simulator.info["control"])
    try:
        temperature_C, pressure_kPa = bench.environment()
    finally:
        bench.close()
    defaults = {
        **demo_metadata(),
        "registers": args.registers,
        "temperature_C": temperature_C,
        "pressure_entered": pressure_kPa,
        "pressure_unit": "kPa",
    }
    return run_console(socket_path, setup_defaults=defaults, demo_database=args.db_path)


async def _unattended(
    args: argparse.Namespace, socket_path: str, simulator: Child, out: TextIO
) -> int:
    from chargebook.acquire.client import DaemonClient
    from chargebook.acquire.commands.demo_data import demo_metadata
    from chargebook.acquire.commands.operator_auto import (
        ACTOR,
        AutoOperator,
        AutoOperatorError,
        environment_from_bench,
    )
    from chargebook.acquire.daemon.bench import Bench
    from chargebook.acquire.record.store import Store
    from chargebook.acquire.reports.summary_text import reading_line, result_table
    from chargebook.acquire.session.result import result_document

    bench = Bench(simulator.info["control"])
    environment = environment_from_bench(simulator.info["control"])

    def progress(reading_set: dict[str, Any], reading: dict[str, Any]) -> None:
        print(reading_line(reading_set, reading), file=out, flush=True)

    metadata = {**demo_metadata(), "registers": args.registers}
    plans = args.plan or []
    client = await DaemonClient.connect(socket_path, client="demo", operator=ACTOR)
    finals = []
    try:
        if not args.plan:
            operator = AutoOperator(client, environment, on_reading=progress)
            return await _visit(args, operator, bench, out)
        for plan in plans:
            if len(plans) > 1:
                print(f"-- {_PLAN_WORDS.get(plan, 'session')} (plan {plan})", file=out, flush=True)
            operator = AutoOperator(client, environment, on_reading=progress)
            finals.append(await operator.run(metadata, plan))
        truth = bench.truth()
    except AutoOperatorError as error:
        print(f"chargebook demo: {error}", file=sys.stderr)
        return EXIT_FAILURE
    finally:
        await client.close()
        bench.close()
    with Store.open(args.db_path, read_only=True) as store:
        documents = [result_document(store, final["session"]["id"]) for final in finals]
    if args.json and len(documents) == 1:
        print(json.dumps({**documents[0], "truth": truth}, indent=2, ensure_ascii=False))
    elif args.json:
        flow = {"full_calibration": documents[0], "monthly_check": documents[1], "truth": truth}
        print(json.dumps(flow, indent=2, ensure_ascii=False))
    else:
        for plan, document in zip(plans, documents, strict=True):
            print(f"\n{_PLAN_WORDS.get(plan, 'session')}:", file=out)
            print(result_table(document, truth), file=out)
    return EXIT_OK


async def _visit(args: argparse.Namespace, operator: Any, bench: Any, out: TextIO) -> int:
    """Run the demo visit of three beams with ``operator``; print its result by beam."""
    import datetime

    from chargebook.acquire.commands.demo_data import DEMO_METADATA, demo_visit_beams
    from chargebook.acquire.protocol import CAUTION
    from chargebook.acquire.record.store import Store
    from chargebook.acquire.reports.text import tables_text
    from chargebook.acquire.reports.visit import load_visit, visit_tables

    truth = bench.truth()
    today = datetime.datetime.now(datetime.UTC).date().isoformat()
    beams = demo_visit_beams(truth, today)
    first, plan = beams[0]  # the 6 MV beam, as the demo clinic's registers hold it
    beams[0] = ({**first, "registers": args.registers}, plan)

    def starting(metadata: dict[str, Any], plan: str) -> None:
        print(f"\nbeam {metadata['beam']}, plan {plan}", file=out, flush=True)

    final = await operator.run_visit(
        DEMO_METADATA["treatment_machine"], DEMO_METADATA["operator"], beams, starting
    )
    visit_id = final["visit"]["id"]
    with Store.open(args.db_path, read_only=True) as store:
        summary, events = load_visit(store, visit_id)
        if args.json:
            print(json.dumps({**summary.to_dict(), "truth": truth}, indent=2, ensure_ascii=False))
        else:
            print("", file=out)
            print(tables_text(visit_tables(summary, events)), file=out)
            print(f"\n{CAUTION}", file=out)
            print(
                f"\nReview it as a second person: chargebook review --visit {visit_id} --approve "
                f'--reviewer "reviewer B" --comment "..." --db {args.db_path}',
                file=out,
            )
    return EXIT_OK


_PLAN_WORDS = {FULL_PLAN: "full calibration", CHECK_PLAN: "monthly check, k_pol and k_s carried"}
