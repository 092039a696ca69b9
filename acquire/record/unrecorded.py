"""Raw lines set aside: what a daemon that stops while the record cannot commit writes beside
the station database, and what the next daemon start records from it.

While another program holds the database's write lock (or the disk is full) the daemon keeps
the raw lines it reads in memory. If it is asked to stop then and the lines still cannot be
committed within its wait, it writes them to a side file beside the database,
``<db>.unrecorded-<UTC stamp>.jsonl`` (written whole or not at all: a temporary file, fsynced,
renamed), and exits with ``EXIT_LINES_SET_ASIDE``. The next start records every line of every
such file into the traffic table, chained as usual, in one transaction per file with an
``unrecorded_lines_recovered`` event per session, then renames the file ``*.recovered``. A file
that cannot be read as one is refused, naming the file and the line, and left where it is.

The file: one JSON object per line. The first is the header (``format``, ``database``,
``station_uuid``, ``session_uuids`` (session id -> uuid), ``lines`` (how many), ``lines_sha256``
(of the lines after the header, as written), ``written_at``, ``pid``, ``reason``, ``cause``);
lines whose SHA-256 is not the header's, or read for another station, or for a session this
database does not hold as it was, are refused. Each following object is a raw line:
``session_id`` (null outside a session), ``t_s`` (the daemon's clock when read, s),
``recorded_at`` (UTC ISO 8601, when read), ``direction`` (``tx``/``rx``) and ``line_b64`` (the
line's bytes exactly as sent or received, base64).

The engine never heard of these lines (nothing is posted before its lines are committed): no
reading was derived from them, and none is when they are recovered.
"""

from __future__ import annotations

import base64
import binascii
import glob
import hashlib
import json
import math
import os
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from chargebook.acquire.record import events as ev
from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.migrations import TRAFFIC_DIRECTIONS
from chargebook.acquire.record.store import Store, StoreError, TrafficLine

#: The format of the header, written in every side file.
FORMAT = "chargebook raw lines not recorded, 1"
#: What a side file's name adds to the database file's name, before the stamp.
INFIX = ".unrecorded-"
#: What a side file's name takes once its lines are recorded.
RECOVERED_SUFFIX = ".recovered"
#: Who recovers the lines, in the audit log.
RECOVERY_ACTOR = "daemon"
#: Said in every recovery event.
RECOVERY_NOTE = (
    "raw lines read before the daemon's last stop, while the record could not commit; the engine "
    "never heard of them, so no reading was derived from them"
)
_LINE_KEYS = frozenset({"session_id", "t_s", "recorded_at", "direction", "line_b64"})


class UnrecordedFileError(StoreError):
    """A side file of raw lines cannot be read as one; it names the file and the line."""

    def __init__(self, path: Path, line_number: int, problem: str) -> None:
        super().__init__(
            f"{path} line {line_number}: {problem}; the daemon records the raw lines of this file "
            "before it starts, so it does not start: correct the file (or move it away, which "
            "loses its lines), then start the daemon again"
        )
        self.path = path
        self.line_number = line_number


@dataclass(frozen=True)
class SetAside:
    """Raw lines read from a side file: where from, the lines, the file's SHA-256, and what
    its header says of the run that wrote it (its pid, why it stopped, why it could not
    commit; None where the header does not say)."""

    path: Path
    lines: tuple[TrafficLine, ...]
    sha256: str
    pid: int | None = None
    stopped_by: str | None = None
    cause: str | None = None
    #: The station and the sessions the lines were read for (checked before they are recorded).
    station_uuid: str | None = None
    session_uuids: Mapping[int, str] = field(default_factory=dict)


def side_files(db_path: Path) -> list[Path]:
    """Return the side files of raw lines beside ``db_path`` not yet recorded, oldest first
    (the database's name taken as it is: ``room[1].sqlite`` is no pattern)."""
    return sorted(db_path.parent.glob(f"{glob.escape(db_path.name)}{INFIX}*.jsonl"))


def waiting(store: Store, db_path: Path) -> list[str]:
    """Return, in words, each side file beside ``db_path`` whose raw lines are not yet in the
    record of ``store`` (what ``verify`` says): how many lines, or why a start would refuse it
    (the same checks as :func:`recover`)."""
    said = []
    for path in side_files(db_path):
        try:
            found = read_set_aside(path)
            _require_station_and_sessions(store, found)
            count = len(found.lines)
        except (UnrecordedFileError, OSError) as error:
            said.append(f"cannot be recorded: {error}")
            continue
        said.append(
            f"{path} holds {raw_lines(count)} read before a daemon's stop, not yet in the "
            "record: the next daemon start on this database records them"
        )
    return said


def set_aside(
    db_path: Path,
    lines: Sequence[TrafficLine],
    *,
    reason: str,
    cause: str | None,
    station_uuid: str | None,
    session_uuids: Mapping[int, str],
) -> Path:
    """Write ``lines`` to a new side file beside ``db_path`` (whole or not at all, fsynced);
    return its path. ``reason``: why the daemon stops; ``cause``: why the record could not
    commit; ``station_uuid`` and ``session_uuids`` (session id -> uuid): whose lines they are,
    checked before they are recorded (None where the record could not say). Raises OSError
    when it cannot be written."""
    now = datetime.now(UTC)
    path = db_path.with_name(f"{db_path.name}{INFIX}{now:%Y%m%dT%H%M%S.%fZ}.jsonl")
    body = [json.dumps(_line_object(line)) for line in lines]
    header = {
        "format": FORMAT,
        "database": db_path.name,
        "station_uuid": station_uuid,
        "session_uuids": {str(key): value for key, value in session_uuids.items()},
        "lines": len(lines),
        "lines_sha256": _body_digest(body),
        "written_at": now.isoformat(timespec="microseconds"),
        "pid": os.getpid(),
        "reason": reason,
        "cause": cause,
    }
    rows = [json.dumps(header), *body]
    temporary = path.with_name(path.name + ".tmp")
    with open(temporary, "w", encoding="utf-8") as out:
        out.write("\n".join(rows) + "\n")
        out.flush()
        os.fsync(out.fileno())
    os.replace(temporary, path)
    folder = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(folder)  # the rename itself survives a power cut
    finally:
        os.close(folder)
    return path


def read_set_aside(path: Path) -> SetAside:
    """Return the raw lines of a side file, each checked; UnrecordedFileError naming the line
    that is not one (or a header whose count does not match)."""
    data = path.read_bytes()
    texts = data.decode("utf-8", errors="replace").split("\n")
    if texts and texts[-1] == "":
        del texts[-1]  # the newline that ends the last line
    if not texts:
        raise UnrecordedFileError(path, 1, "the file is empty (no header)")
    header = _object(path, 1, texts[0])
    if header.get("format") != FORMAT:
        raise UnrecordedFileError(path, 1, f"the header's format is not {FORMAT!r}")
    lines = tuple(_traffic_line(path, number, text) for number, text in enumerate(texts[1:], 2))
    count = header.get("lines")
    if type(count) is not int or count != len(lines):
        held = f"{len(lines):,} line{'' if len(lines) == 1 else 's'}"
        said = f"the header's count of lines is {count!r}"
        raise UnrecordedFileError(path, 1, f"{said}, and the file holds {held}")
    if header.get("lines_sha256") != _body_digest(texts[1:]):
        raise UnrecordedFileError(
            path, 1, "the lines are not those the daemon wrote (their SHA-256 is not the header's)"
        )
    return SetAside(
        path,
        lines,
        hashlib.sha256(data).hexdigest(),
        pid=_of_type(header.get("pid"), int),
        stopped_by=_of_type(header.get("reason"), str),
        cause=_of_type(header.get("cause"), str),
        station_uuid=_of_type(header.get("station_uuid"), str),
        session_uuids=_session_uuids(path, header.get("session_uuids")),
    )


def _body_digest(texts: Sequence[str]) -> str:
    """Return the SHA-256 of a side file's lines after the header, as written (a line a
    newline)."""
    return hashlib.sha256("".join(text + "\n" for text in texts).encode("utf-8")).hexdigest()


def _session_uuids(path: Path, value: object) -> dict[int, str]:
    """Return the header's session id -> uuid map, checked."""
    wrong = UnrecordedFileError(path, 1, "session_uuids is not a map of session ids to uuids")
    if not isinstance(value, dict):
        raise wrong
    uuids = {}
    for key, uuid in value.items():
        if not (key.isascii() and key.isdecimal()) or not isinstance(uuid, str) or not uuid:
            raise wrong
        uuids[int(key)] = uuid
    return uuids


def raw_lines(count: int) -> str:
    """Return "1 raw line", "1,234 raw lines": how the daemon and ``verify`` count them."""
    return f"{count:,} raw line{'' if count == 1 else 's'}"


def recover(store: Store, path: Path) -> tuple[int, SetAside]:
    """Record the raw lines of side file ``path`` in the traffic table (one transaction, with
    an ``unrecorded_lines_recovered`` event per session), then rename the file ``*.recovered``;
    return how many lines were recorded (0 when a recovery event already names the file's
    SHA-256: it was recorded before, and is only renamed) and what the file held.
    UnrecordedFileError when the file is malformed or names a session the database does not
    hold: nothing is recorded then."""
    found = read_set_aside(path)
    recorded = 0
    if not _recovered_before(store, found.sha256):
        _require_station_and_sessions(store, found)
        with store.atomic():
            store.add_traffic_many(found.lines)
            for session_id, count in Counter(line[0] for line in found.lines).items():
                detail = ev.UnrecordedLinesRecovered(
                    file=path.name,
                    sha256=found.sha256,
                    lines=count,
                    file_lines=len(found.lines),
                    first_recorded_at=found.lines[0][2],
                    last_recorded_at=found.lines[-1][2],
                    stopped_by=found.stopped_by,
                    cause=found.cause,
                    note=RECOVERY_NOTE,
                )
                store.add_event(
                    session_id, RECOVERY_ACTOR, EventKind.UNRECORDED_LINES_RECOVERED, detail
                )
        recorded = len(found.lines)
    os.replace(path, path.with_name(path.name + RECOVERED_SUFFIX))
    return recorded, found


def _of_type(value: object, kind: type) -> Any:
    """Return ``value`` if it is a ``kind`` (not a bool), else None."""
    return value if isinstance(value, kind) and not isinstance(value, bool) else None


def _line_object(line: TrafficLine) -> dict[str, Any]:
    session_id, t_s, recorded_at, direction, data = line
    return {
        "session_id": session_id,
        "t_s": t_s,
        "recorded_at": recorded_at,
        "direction": direction,
        "line_b64": base64.b64encode(bytes(data)).decode("ascii"),
    }


def _object(path: Path, number: int, text: str) -> dict[str, Any]:
    try:
        value = json.loads(text)
    except json.JSONDecodeError as error:
        raise UnrecordedFileError(path, number, f"not a JSON object ({error.msg})") from None
    if not isinstance(value, dict):
        raise UnrecordedFileError(path, number, "not a JSON object")
    return value


def _traffic_line(path: Path, number: int, text: str) -> TrafficLine:
    """Return one raw line of a side file, checked."""
    value = _object(path, number, text)
    if set(value) != _LINE_KEYS:
        keys = ", ".join(sorted(_LINE_KEYS))
        raise UnrecordedFileError(path, number, f"the keys are not exactly {keys}")
    session_id, t_s = value["session_id"], value["t_s"]
    if session_id is not None and (type(session_id) is not int or session_id < 1):
        raise UnrecordedFileError(path, number, f"session_id {session_id!r} is not a session id")
    if type(t_s) not in (int, float) or not math.isfinite(t_s):
        raise UnrecordedFileError(path, number, f"t_s {t_s!r} is not a finite number of seconds")
    if not _is_utc_time(value["recorded_at"]):
        raise UnrecordedFileError(path, number, "recorded_at is not a UTC time (ISO 8601)")
    if value["direction"] not in TRAFFIC_DIRECTIONS:
        allowed = ", ".join(TRAFFIC_DIRECTIONS)
        raise UnrecordedFileError(
            path, number, f"direction {value['direction']!r} is not one of {allowed}"
        )
    try:
        data = base64.b64decode(str(value["line_b64"]), validate=True)
    except (binascii.Error, ValueError):
        raise UnrecordedFileError(path, number, "line_b64 is not base64") from None
    return (session_id, float(t_s), value["recorded_at"], value["direction"], data)


def _is_utc_time(value: object) -> bool:
    """Return True for an ISO 8601 time with a zero UTC offset, as the daemon stamps lines."""
    if not isinstance(value, str):
        return False
    try:
        stamp = datetime.fromisoformat(value)
    except ValueError:
        return False
    offset = stamp.utcoffset()
    return offset is not None and not offset


def _require_station_and_sessions(store: Store, found: SetAside) -> None:
    """Refuse lines written for another station, or for sessions this database does not hold
    as they were (the database replaced or restored from a backup since)."""
    station = store.station().uuid
    if not found.station_uuid:
        raise UnrecordedFileError(found.path, 1, "the header does not name its station's uuid")
    if found.station_uuid != station:
        raise UnrecordedFileError(
            found.path,
            1,
            f"its lines were read for station {found.station_uuid}, and this database is "
            f"station {station}: put the file beside that station's database",
        )
    wanted = {line[0] for line in found.lines if line[0] is not None}
    held = {session.id: session for session in store.sessions_of(wanted)}
    for number, line in enumerate(found.lines, 2):
        session_id = line[0]
        if session_id is None:
            continue
        if session_id not in held:
            raise UnrecordedFileError(
                found.path, number, f"session {session_id} is not in the station database"
            )
        if held[session_id].status != "open":
            # the daemon closes no session while its lines cannot be committed
            raise UnrecordedFileError(
                found.path,
                number,
                f"session {session_id} is {held[session_id].status}, and a daemon sets aside "
                "only the lines of a session still open",
            )
        written = found.session_uuids.get(session_id)
        if written is None and found.session_uuids:
            raise UnrecordedFileError(
                found.path, number, f"session {session_id} is not named in the header"
            )
        if written is not None and written != held[session_id].uuid:
            raise UnrecordedFileError(
                found.path,
                number,
                f"session {session_id} of this database is not the session the line was read "
                f"in (uuid {held[session_id].uuid}, not {written}): was the database replaced or "
                "restored from a backup?",
            )


def _recovered_before(store: Store, sha256: str) -> bool:
    """Return whether a recovery event names this SHA-256 (the file was recorded, not renamed)."""
    for events in store.events_of_kind(EventKind.UNRECORDED_LINES_RECOVERED).values():
        if any(event.detail().get("sha256") == sha256 for event in events):
            return True
    return False
