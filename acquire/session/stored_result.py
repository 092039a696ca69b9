"""A closed session's result as kept in the record (``session_results``), and when to trust it.

``history`` lists one machine's years of sessions; evaluating each of them again takes tens
of seconds. So when a session closes, the store writes its :class:`ResultSummary` (what
``history`` shows of it: dose per MU, expected, deviation, tolerance, U, flags, or why there
is no result) in the same transaction, computed by :func:`evaluate_session`, and stamped with
:func:`evaluation_stamp`: a digest of the source of everything that evaluation runs
(``corrections/``, ``acquire/session/``, the store's rows and the event kinds). A row whose
stamp is not the running code's is never used: that session is evaluated again, live (correct,
slower), until the daemon refreshes the row (:func:`refresh_results`). A stored float is
written with ``repr`` (JSON), so it reads back as the same float, bit for bit.

Nothing here computes physics, and nothing here imports it until a session must be evaluated
live: reading kept results needs neither numpy nor ``corrections``.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import json
import sys
import uuid
from collections.abc import Iterable
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from chargebook.acquire.record.reader import RecordReader

if TYPE_CHECKING:
    from chargebook.acquire.record.store import Store
    from chargebook.acquire.session.evaluation import SessionEvaluation

#: The source folders (relative to the package) and files whose code decides a result.
_ROOT = Path(__file__).resolve().parents[2]
EVALUATION_SOURCES = (
    "corrections",
    "acquire/session",
    "acquire/record/store.py",
    "acquire/record/reader.py",
    "acquire/record/events.py",  # the detail shapes the evaluation reads from events
)


@dataclass(frozen=True)
class ResultSummary:
    """What ``history`` shows of one session's result. Values are None where the session has
    no result; ``error`` then says why (the evaluation's words)."""

    dose_per_MU_cGy: float | None
    expected_cGy_per_MU: float | None
    deviation_pct: float | None
    tolerance_pct: float | None
    within_tolerance: bool | None
    M_corrected_nC: float | None
    dose_Gy: float | None
    U_expanded_pct: float | None
    #: The warning and error flags, (code, severity), in the evaluation's order (info left out).
    flags: tuple[tuple[str, str], ...]
    error: str | None

    def to_json(self) -> str:
        """Return the summary as JSON (floats as ``repr``: they read back bit for bit)."""
        return json.dumps(asdict(self), sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> ResultSummary:
        """Return the summary stored as ``text`` (:meth:`to_json`)."""
        return cls.from_data(json.loads(text))

    @classmethod
    def from_data(cls, data: dict[str, Any]) -> ResultSummary:
        """Return the summary whose decoded JSON is ``data`` (its seal, if any, left aside)."""
        fields = {name: value for name, value in data.items() if name != "seal"}
        fields["flags"] = tuple((str(code), str(severity)) for code, severity in data["flags"])
        return cls(**fields)


def summarize(found: SessionEvaluation) -> ResultSummary:
    """Return what ``history`` shows of one evaluation."""
    evaluation = found.evaluation
    if evaluation is None:
        return ResultSummary(None, None, None, None, None, None, None, None, (), found.error)
    return ResultSummary(
        dose_per_MU_cGy=_float(evaluation.dose_per_MU_cGy),
        expected_cGy_per_MU=_float(evaluation.expected_cGy_per_MU),
        deviation_pct=_float(evaluation.deviation_pct),
        tolerance_pct=_float(evaluation.tolerance_pct),
        within_tolerance=None
        if evaluation.within_tolerance is None
        else bool(evaluation.within_tolerance),
        M_corrected_nC=_float(evaluation.M_corrected_nC),
        dose_Gy=_float(evaluation.dose_Gy),
        U_expanded_pct=_float(evaluation.U_expanded_pct),
        flags=tuple((f.code, f.severity) for f in evaluation.flags if f.severity != "info"),
        error=found.error,
    )


def _float(value: float | None) -> float | None:
    """Return ``value`` as a Python float, the same bits (a numpy float64 would otherwise show
    its type where a report writes the number's repr)."""
    return None if value is None else float(value)


@functools.cache
def evaluation_stamp() -> str:
    """Return the stamp of the running evaluation: a SHA-256 of the Python and numpy releases
    and of the source files that decide a session's result (:data:`EVALUATION_SOURCES`), by
    path and content. Any change to them,
    even one that leaves every result as it was, changes it: the stored rows are then
    evaluated again rather than trusted."""
    digest = hashlib.sha256()
    # The arithmetic under the source: the Python and numpy releases (read without importing).
    digest.update(f"python {sys.version_info[:2]} numpy {_numpy_version()}\0".encode())
    try:
        for path in _source_files():
            digest.update(path.relative_to(_ROOT).as_posix().encode() + b"\0")
            digest.update(path.read_bytes() + b"\0")
    except OSError:
        # No source to stamp (an installation without .py files): a stamp of this process
        # alone, so that no stored result is trusted, and none this process stores ever is.
        return f"unstamped-{uuid.uuid4()}"
    return digest.hexdigest()


def _numpy_version() -> str:
    """Return the installed numpy's version, read from the name of its distribution's folder
    beside the package (neither numpy nor ``importlib.metadata``, which looks through every
    installed distribution, is imported: this runs on every read of a kept result)."""
    from importlib.util import find_spec

    spec = find_spec("numpy")
    if spec is None or spec.origin is None:
        return "unknown"
    folder = Path(spec.origin).parent.parent
    found = sorted(
        p.name for kind in ("dist-info", "egg-info") for p in folder.glob(f"numpy-*.{kind}")
    )
    if found:  # "numpy-2.4.6.dist-info"
        return found[-1].removeprefix("numpy-").rsplit(".", 1)[0]
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("numpy")
    except PackageNotFoundError:
        return "unknown"


def _source_files() -> list[Path]:
    """Return the source files of :data:`EVALUATION_SOURCES`; OSError when one is missing."""
    files: list[Path] = []
    for name in EVALUATION_SOURCES:
        path = _ROOT / name
        found = sorted(path.rglob("*.py")) if path.is_dir() else [path]
        if not found or not all(f.is_file() for f in found):
            raise FileNotFoundError(f"no evaluation source at {path}")
        files += found
    return files


def evaluate_summary(store: RecordReader, session_id: int) -> ResultSummary:
    """Return the session's result evaluated now, from what is recorded (the physics is
    imported here, only when a session has no current kept result)."""
    from chargebook.acquire.session.evaluation import evaluate_session

    return summarize(evaluate_session(store, session_id))


def sealed_json(session_id: int, stamp: str, summary: ResultSummary) -> str:
    """Return the summary as kept: its JSON with a ``seal``, a SHA-256 of the session's id, the
    stamp and the rest of the JSON, so that a row edited outside chargebook is told apart from
    one it wrote (and evaluated again rather than shown)."""
    data = json.loads(summary.to_json())
    data["seal"] = _seal(session_id, stamp, data)
    return json.dumps(data, sort_keys=True)


def _seal(session_id: int, stamp: str, data: dict[str, Any]) -> str:
    body = json.dumps({k: v for k, v in data.items() if k != "seal"}, sort_keys=True)
    return _digest(session_id, stamp, body)


def _digest(session_id: int, stamp: str, body: str) -> str:
    return hashlib.sha256(f"{session_id}\0{stamp}\0{body}".encode()).hexdigest()


def _sealed(session_id: int, stamp: str, data: dict[str, Any], text: str) -> bool:
    """Return True when the seal of ``data`` (decoded from ``text``) matches its content.

    As :func:`sealed_json` writes it, the sealed JSON is ``text`` without its seal: checked
    first, without encoding the content again (a history reads thousands). Text written
    otherwise (the same content, spaced or ordered differently) is checked by its content.
    """
    seal = data.get("seal")
    if not isinstance(seal, str):
        return False
    body = text.replace(f'"seal": "{seal}", ', "", 1)
    if body != text and _digest(session_id, stamp, body) == seal:
        return True
    return _seal(session_id, stamp, data) == seal


def kept_summary(session_id: int, stamp: str, text: str) -> ResultSummary:
    """Return the summary kept as ``text`` for ``session_id`` under ``stamp``; ValueError,
    naming what is wrong, when it cannot be read or its seal does not match."""
    try:
        data = json.loads(text)
    except ValueError as error:
        raise ValueError(f"its stored result is not JSON ({error})") from None
    if not isinstance(data, dict) or not _sealed(session_id, stamp, data, text):
        raise ValueError(
            "its stored result was changed after it was kept (its seal does not match)"
        )
    try:
        return ResultSummary.from_data(data)
    except (TypeError, ValueError, KeyError) as error:
        raise ValueError(f"its stored result has not the shape of one ({error})") from None


def stored_row(store: RecordReader, session_id: int) -> tuple[str, str] | None:
    """Return (stamp, JSON) of the session's result as the store keeps it: what a store calls,
    inside the transaction that closes a session (``Store.results_on_close``). None, and
    nothing kept, when the evaluation fails unexpectedly: the session still closes, and is
    evaluated live (where the failure shows) until a refresh."""
    try:
        stamp = evaluation_stamp()
        return stamp, sealed_json(session_id, stamp, evaluate_summary(store, session_id))
    except Exception:  # a bug in the evaluation must not undo the operator's close
        return None


def results_of(store: RecordReader, session_ids: Iterable[int]) -> dict[int, ResultSummary]:
    """Return the result of each session: the stored one when the running code computed it
    (its stamp), else (stale, missing, not closed) evaluated now, from what is recorded."""
    session_ids = list(session_ids)
    stamp, stored = evaluation_stamp(), store.session_results(session_ids)
    found: dict[int, ResultSummary] = {}
    for session_id in session_ids:
        row = stored.get(session_id)
        kept = None
        if row is not None and row[0] == stamp:
            with contextlib.suppress(ValueError):  # unreadable or edited: `verify` names it
                kept = kept_summary(session_id, stamp, row[1])
        found[session_id] = kept if kept is not None else evaluate_summary(store, session_id)
    return found


def refresh_some(store: Store, limit: int) -> int:
    """Write, in one transaction, the result of up to ``limit`` closed sessions whose stored
    one is missing (recorded before ``session_results``) or stale (another stamp); return how
    many were written (0: none is left)."""
    stamp = evaluation_stamp()
    with store.atomic():
        wanting = store.sessions_without_result(stamp, limit)
        for session_id in wanting:
            summary = evaluate_summary(store, session_id)
            store.put_session_result(session_id, stamp, sealed_json(session_id, stamp, summary))
    return len(wanting)


def refresh_results(store: Store, batch: int = 50) -> int:
    """Write the result of every closed session whose stored one is missing or stale, ``batch``
    sessions per transaction; return how many were written."""
    written = 0
    while found := refresh_some(store, batch):
        written += found
    return written


def differing_results(store: RecordReader, session_ids: Iterable[int] | None = None) -> list[str]:
    """Return, in words, each stored result of the running evaluation (its stamp: the ones
    ``history`` shows) that no longer equals a fresh evaluation of its session (of
    ``session_ids``; None: every session), naming the session and the fields that differ."""
    stamp, stored = evaluation_stamp(), store.session_results()
    wanted = sorted(stored) if session_ids is None else [i for i in session_ids if i in stored]
    found: list[str] = []
    for session_id in wanted:
        row_stamp, text = stored[session_id]
        if row_stamp != stamp:
            continue  # another version's: never shown, refreshed by the daemon
        try:
            kept_summary(session_id, stamp, text)
        except ValueError as error:
            found.append(f"session {session_id}: {error}")
            continue
        kept, fresh = json.loads(text), json.loads(evaluate_summary(store, session_id).to_json())
        fields = [name for name in sorted(fresh) if kept.get(name) != fresh[name]]
        if fields:
            changes = "; ".join(
                f"{name}: stored {kept.get(name)!r}, evaluated now {fresh[name]!r}"
                for name in fields
            )
            found.append(
                f"session {session_id}: its stored result differs from a fresh evaluation of "
                f"its recorded values ({changes})"
            )
    return found


def missing_results(store: Store, session_ids: Iterable[int] | None = None) -> list[str]:
    """Return, in words, what is missing of the kept results of the closed sessions among
    ``session_ids`` (None: every session): the whole ``session_results`` table, or the rows of
    some sessions. Never a fault of the record: kept results are a cache of each session's
    evaluation, outside the hash chain; those sessions are evaluated live from their recorded
    rows until the daemon keeps their results again, as it starts on the file."""
    rebuilt = (
        "kept results are a cache, not the record: each session is evaluated live from its "
        "recorded rows (what `history` shows) until the daemon keeps its result again the next "
        "time it starts on this file (`chargebook serve --db FILE`)"
    )
    table = store.results_table()
    if table == "missing":
        return [f"the kept session results (table session_results) are missing: {rebuilt}"]
    if table == "other":
        return [
            "the kept session results (table session_results) have columns other than "
            f"chargebook's, and are not read; the daemon sets that table aside, renamed, as it "
            f"starts on this file: {rebuilt}"
        ]
    wanted = None if session_ids is None else set(session_ids)
    kept = store.session_results()
    without = [
        session.id
        for session in store.sessions()
        if session.status != "open"
        and session.id not in kept
        and (wanted is None or session.id in wanted)
    ]
    if not without:
        return []
    names = ", ".join(str(session_id) for session_id in without)
    plural = "s" if len(without) > 1 else ""
    return [f"closed session{plural} {names} ha{'ve' if plural else 's'} no kept result: {rebuilt}"]
