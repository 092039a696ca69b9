"""The views a physicist browses a station file by (migration ``browse_views``), read with the
sqlite3 module and served by Datasette on loopback with the shipped metadata file.

The session is the invented example worksheet (Example Clinic, fictional); the check values are
what was recorded, read back through the views.
"""

from __future__ import annotations

import json
import os
import socket
import sqlite3
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest
from chargebook.acquire.record.review import record_review
from chargebook.acquire.record.store import Store

from tests.acquire.recorded_session import example, record_example_session

ROOT = Path(__file__).parents[2]
METADATA = ROOT / "contrib" / "datasette-metadata.json"
RAW_LINE = b"+1.4790E-08\r\n"


def _station(path: Path) -> tuple[int, int]:
    """Record two example sessions, the first reviewed and with one raw line; their ids."""
    with Store.open(path) as store:
        first = record_example_session(store)
        second = record_example_session(store, beam="10 MV", k_Q=0.985)
        store.add_traffic(first, 12.5, "rx", RAW_LINE)
        record_review(store, first, "approve", "reviewer B", "fine")
    return first, second


def _rows(path: Path, sql: str) -> list[dict]:
    conn = sqlite3.connect(path)
    conn.row_factory = sqlite3.Row
    try:
        return [dict(row) for row in conn.execute(sql)]
    finally:
        conn.close()


def test_session_overview_takes_the_metadata_out_of_the_json(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    first, second = _station(path)
    rows = _rows(path, "SELECT * FROM session_overview ORDER BY session_id")
    data = example()  # the worksheet the sessions were recorded from
    assert [row["session_id"] for row in rows] == [first, second]
    one, two = rows
    assert one["machine"] == data["session"]["machine"] == "DEMO-LA1"
    assert one["operator"] == data["session"]["operator"]
    assert one["electrometer_serial"] == data["session"]["electrometer"]
    assert (one["chamber_model"], one["chamber_serial"]) == ("thimble 0.6 cc", "SIM-CH-0001")
    assert one["N_Dw"] == data["calibration"]["N_Dw_Gy_per_nC"] and one["N_Dw_unit"] == "Gy/nC"
    assert one["k_Q"] == data["calibration"]["k_Q"]
    assert (one["beam"], two["beam"], two["k_Q"]) == ("6 MV", "10 MV", 0.985)
    assert (one["review"], one["reviewer"], two["review"]) == ("approved", "reviewer B", None)
    assert one["status"] == "finished" and one["closed_at_utc"]
    with Store.open(path, read_only=True) as store:
        used = [r for r in store.readings(first) if not r.settling]
        assert one["session_uuid"] == store.session(first).uuid
        assert one["station_name"] == store.station().name
    assert one["readings_used"] == len(used)


def test_readings_come_with_their_set_and_traffic_as_text(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    first, _ = _station(path)
    readings = _rows(path, f"SELECT * FROM reading_overview WHERE session_id = {first}")
    with Store.open(path, read_only=True) as store:
        stored = store.readings(first)
        sets = {s.id: s for s in store.sets(first)}
    assert [r["charge_nC"] for r in readings] == [r.charge_nC for r in stored]
    assert [(r["purpose"], r["bias_V"]) for r in readings] == [
        (sets[r.set_id].purpose, sets[r.set_id].bias_V) for r in stored
    ]
    assert {r["set_status"] for r in readings} >= {"accepted", "superseded"}
    (line,) = _rows(path, f"SELECT * FROM traffic_text WHERE line_hex = '{RAW_LINE.hex().upper()}'")
    assert (line["session_id"], line["direction"], line["t_s"]) == (first, "received", 12.5)
    assert line["line_text"] == "+1.4790E-08" and bytes.fromhex(line["line_hex"]) == RAW_LINE


def test_the_views_are_read_only(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    _station(path)
    conn = sqlite3.connect(path)
    with pytest.raises(sqlite3.OperationalError, match="cannot modify session_overview"):
        conn.execute("UPDATE session_overview SET operator = 'someone else'")
    conn.close()


def test_the_metadata_file_describes_every_column_of_the_views(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    _station(path)
    tables = json.loads(METADATA.read_text())["databases"]["station"]["tables"]
    for view in ("session_overview", "reading_overview", "traffic_text"):
        columns = [row["name"] for row in _rows(path, f"PRAGMA table_info({view})")]
        assert list(tables[view]["columns"]) == columns, view
    units = tables["reading_overview"]["columns"]
    assert "in nC" in units["charge_nC"] and "in volts" in units["bias_V"]


def _free_loopback_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _get_json(url: str, server: subprocess.Popen) -> dict:
    """Return the JSON at ``url`` once the server answers (it fails if the server exits)."""
    while True:
        assert server.poll() is None, server.stderr.read() if server.stderr else ""
        try:
            with urllib.request.urlopen(url, timeout=5) as answer:
                return json.loads(answer.read())
        except OSError:
            time.sleep(0.2)


@pytest.mark.slow
def test_datasette_serves_the_views_on_loopback_with_the_metadata(tmp_path: Path) -> None:
    path = tmp_path / "station.sqlite"
    first, _ = _station(path)
    port = _free_loopback_port()
    command = [sys.executable, "-m", "datasette", "serve", "--immutable", str(path)]
    command += ["-m", str(METADATA), "-h", "127.0.0.1", "-p", str(port)]
    server = subprocess.Popen(
        command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=dict(os.environ)
    )
    try:
        base = f"http://127.0.0.1:{port}/station"
        found = _get_json(f"{base}/session_overview.json?_shape=objects", server)
        described = _get_json(f"http://127.0.0.1:{port}/-/metadata.json", server)
    finally:
        server.terminate()
        server.wait(timeout=30)
    assert [row["session_id"] for row in found["rows"]] == [first, first + 1]
    assert found["rows"][0]["machine"] == "DEMO-LA1"
    assert described == json.loads(METADATA.read_text())
