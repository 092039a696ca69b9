"""Exports of one stored session: CSV (the readings), JSON (everything) and HTML (the report).

CSV: one row per reading, settling and superseded ones included, with its set's step, purpose,
bias, attempt and status; ``seq`` (the stored order, settling readings included) and ``reading``
(the reading's name everywhere else: "s1", "s2" settling, then "1", "2", ...); ``used`` (1 when
the reading enters the dose: a non-settling reading of an accepted routine, opposite or
reduced-bias set) and ``role`` (what the reading is for, in words: ``dose``, ``leakage check``,
``return check``, ``warm-up``, ``settling``, or ``set superseded`` and the like for a set that
was not accepted); ``station_uuid`` and ``session_uuid`` (the session's ids across stations).
Columns: :data:`CSV_COLUMNS`.

JSON: one object with the keys of :data:`JSON_KEYS`:

* ``format`` ("chargebook-session") and ``format_version`` (1);
* ``generated_at`` (UTC ISO) and ``chargebook_version``;
* ``session``: the stored row (``id, created_at, status, convention, beam, replay_of,
  closed_at, reason, uuid``) with ``metadata`` and ``plan`` decoded;
* ``station``: the station that keeps the record (``uuid``, ``name``, ``created_at``);
* ``review``: the review (``status`` approved or rejected, ``reviewer``, ``comment``,
  ``reviewed_at``, ``account``, ``measured_by``), or null while unreviewed;
* ``instrument``: the identity the daemon recorded (``instrument_identified``), or null;
* ``sets``: each reading set's stored row, with ``readings`` (each reading's stored row);
* ``environment``: every environment entry; ``events``: the whole audit log, ``detail`` decoded;
* ``traffic_lines``: how many raw instrument lines are kept (``traffic`` too, with
  ``include_traffic``: each line's ``t_s, recorded_at, direction`` and ``line`` as text with
  undecodable bytes escaped);
* ``results``: ``Evaluation.to_dict()`` recomputed from the raw values, or null;
  ``results_error``: why there are no results, or null;
* ``integrity``: the check of the session's hash chain (``verified``, ``rows``, ``head``,
  ``problems``, each naming the table and row that no longer matches), as ``chargebook verify``;
* ``caution``: the safety caution.

HTML: see ``report_html``.
"""

from __future__ import annotations

import csv
import io
import json
import os
import sys
from datetime import UTC, datetime
from typing import Any

from chargebook.acquire.protocol import CAUTION
from chargebook.acquire.record.reader import RecordReader
from chargebook.acquire.reports.data import SessionRecord, plain
from chargebook.acquire.session.numbering import reading_labels

FORMATS = ("csv", "json", "html")
JSON_FORMAT = "chargebook-session"
JSON_FORMAT_VERSION = 1
JSON_KEYS = (
    "format",
    "format_version",
    "generated_at",
    "chargebook_version",
    "session",
    "station",
    "review",
    "instrument",
    "sets",
    "environment",
    "events",
    "traffic_lines",
    "results",
    "results_error",
    "integrity",
    "caution",
)
CSV_COLUMNS = (
    "session_id",
    "set_id",
    "step_index",
    "step_key",
    "purpose",
    "polarity",
    "bias_V",
    "attempt",
    "set_status",
    "reading_id",
    "seq",
    "reading",
    "t_s",
    "charge_nC",
    "capture",
    "settling",
    "status",
    "used",
    "role",
    "recorded_at",
    "station_uuid",
    "session_uuid",
)

#: What an accepted set's non-settling readings are for, by the set's purpose.
READING_ROLES = {
    "routine": "dose",
    "opposite": "dose",
    "reduced": "dose",
    "leakage": "leakage check",
    "return_check": "return check",
    "warmup": "warm-up",
}


def reading_role(purpose: str, set_status: str, settling: bool) -> str:
    """Return what a reading is for, in words (the CSV's ``role`` column)."""
    if set_status != "accepted":
        return f"set {set_status}"
    if settling:
        return "settling"
    return READING_ROLES.get(purpose, purpose)


def chargebook_version() -> str:
    """Return the installed chargebook version ("unknown" outside an installed tree).

    Read from the name of the distribution's metadata folder (``chargebook-0.1.0.dist-info``,
    as the wheel format names it), the first along ``sys.path``, where importlib.metadata
    looks; importlib.metadata itself (some 50 ms of a report's CPU to import and search) is
    asked only when no such folder is found.
    """
    for entry in sys.path:
        try:
            names = sorted(os.listdir(entry or "."))
        except OSError:  # a zip file, or a folder that is gone
            continue
        for name in names:
            if name.startswith(_DIST_PREFIX) and name.endswith(_DIST_SUFFIX):
                return name.removeprefix(_DIST_PREFIX).removesuffix(_DIST_SUFFIX)
    from importlib import metadata

    try:
        return metadata.version("chargebook")
    except metadata.PackageNotFoundError:
        return "unknown"


_DIST_PREFIX, _DIST_SUFFIX = "chargebook-", ".dist-info"


def generated_at() -> str:
    """Return the current UTC time as ISO 8601, seconds precision."""
    return datetime.now(UTC).isoformat(timespec="seconds")


def to_csv(record: SessionRecord) -> str:
    """Return the session's readings as CSV text with a header row (:data:`CSV_COLUMNS`)."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for reading_set in record.sets:
        row = reading_set.row
        labels = reading_labels(r.settling for r in reading_set.readings)
        for reading, label in zip(reading_set.readings, labels, strict=True):
            role = reading_role(row.purpose, row.status, reading.settling)
            writer.writerow(
                (
                    record.session.id,
                    row.id,
                    row.step_index,
                    row.step_key,
                    row.purpose,
                    row.polarity,
                    repr(row.bias_V),
                    row.attempt,
                    row.status,
                    reading.id,
                    reading.seq,
                    label,
                    repr(reading.t_s),
                    repr(reading.charge_nC),
                    reading.capture,
                    int(reading.settling),
                    reading.status,
                    int(role == "dose"),
                    role,
                    reading.recorded_at,
                    record.station.uuid if record.station else "",
                    record.session.uuid or "",
                )
            )
    return out.getvalue()


def to_json_data(
    record: SessionRecord, store: RecordReader | None = None, include_traffic: bool = False
) -> dict[str, Any]:
    """Return the session as a JSON-ready dict with the keys of :data:`JSON_KEYS`."""
    session = plain(record.session)
    session["metadata"] = record.session.metadata()
    session["plan"] = record.session.plan()
    del session["metadata_json"], session["plan_json"]
    events = []
    for event in record.events:
        item = plain(event)
        item["detail"] = event.detail()
        del item["detail_json"]
        events.append(item)
    data: dict[str, Any] = {
        "format": JSON_FORMAT,
        "format_version": JSON_FORMAT_VERSION,
        "generated_at": generated_at(),
        "chargebook_version": chargebook_version(),
        "session": session,
        "station": plain(record.station),
        "review": record.review.to_dict() if record.review else None,
        "instrument": record.instrument,
        "sets": [{**plain(s.row), "readings": plain(s.readings)} for s in record.sets],
        "environment": plain(record.environment),
        "events": events,
        "traffic_lines": record.traffic_lines,
        "results": record.evaluation.to_dict() if record.evaluation else None,
        "results_error": record.results_error,
        "integrity": record.integrity.to_dict() if record.integrity else None,
        "caution": CAUTION,
    }
    if include_traffic and store is not None:
        data["traffic"] = [
            {k: v for k, v in plain(t).items() if k not in ("id", "session_id")}
            for t in store.traffic(record.session.id)
        ]
    return data


def to_json(
    record: SessionRecord, store: RecordReader | None = None, include_traffic: bool = False
) -> str:
    """Return the session as JSON text (see :func:`to_json_data`), strict: no NaN."""
    data = to_json_data(record, store, include_traffic)
    return json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def to_html(record: SessionRecord) -> str:
    """Return the session's self-contained printable HTML report."""
    from chargebook.acquire.reports.html import session_html

    stamp = f"Generated {generated_at()} by chargebook {chargebook_version()}."
    return session_html(record, stamp)


def visit_text(store: RecordReader, visit_id: int, format_: str) -> str:
    """Return a calibration visit's export: its summary as JSON, or its printable HTML report
    (csv holds readings, which are the sessions': export each beam's session for them)."""

    from chargebook.acquire.record.store import Store
    from chargebook.acquire.reports.visit import load_visit, visit_html
    from chargebook.corrections.errors import InputError

    if not isinstance(store, Store):
        raise InputError(
            "--visit", visit_id, "a station file (--db FILE)", "is not in the department record"
        )
    summary, events = load_visit(store, visit_id)
    if format_ == "json":
        data = {"generated_at": generated_at(), "chargebook_version": chargebook_version()}
        return json.dumps({**data, "visit": summary.to_dict()}, indent=2, ensure_ascii=False)
    if format_ == "html":
        stamp = f"Generated {generated_at()} by chargebook {chargebook_version()}."
        return visit_html(summary, events, stamp)
    raise InputError("--format", format_, "json or html for a visit", "holds no visit")
