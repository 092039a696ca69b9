"""Output history of one beam: dose per MU by session, against a baseline and the tolerance.

Each session's dose per MU is recomputed from its stored raw values (``report_data``). The
baseline is one of:

* ``expected``: each session's own expected output (the deviation ``evaluate`` reports);
* ``first``: the dose per MU of the first session listed;
* ``mean``: the mean dose per MU of the sessions listed
  (with include_all, both count only the sessions a plain history lists: finished, not
  replays, not rejected; the label then says so);
* ``session:ID``: the dose per MU of session ID (for example the last annual calibration);
* a number: a dose per MU in cGy/MU.

The tolerance band of each session is the tolerance it was evaluated with (entered, or the
library's default from AAPM TG-142). Each session's kind says whether it measured k_pol and k_s
("full calibration") or carried them ("output check").
"""

from __future__ import annotations

import contextlib
import functools
import json
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from chargebook.acquire.record.events import EventKind
from chargebook.acquire.record.reader import RecordReader
from chargebook.acquire.record.review import UNREVIEWED, Review, review_of, review_status
from chargebook.acquire.record.station_label import station_choices, station_labels, stations_of
from chargebook.acquire.record.store import ListedSession, NotFound, SessionRow, StationRow
from chargebook.acquire.reports.session_filter import matches
from chargebook.acquire.reports.table import Table, number, signed, when
from chargebook.acquire.session.action_level import action_level_pct
from chargebook.acquire.session.session_kind import OUTPUT_CHECK, session_kind
from chargebook.acquire.session.stored_result import ResultSummary, results_of
from chargebook.corrections.errors import InputError

BASELINE_WORDS = ("expected", "first", "mean")
BASELINE_ALLOWED = "expected, first, mean, session:ID or a dose per MU in cGy/MU"


@dataclass(frozen=True)
class HistoryPoint:
    """One session of the history; values are None where the session has no result."""

    session_id: int
    created_at: str
    status: str
    machine: str
    beam: str
    dose_per_MU_cGy: float | None
    expected_cGy_per_MU: float | None
    deviation_pct: float | None
    tolerance_pct: float | None
    within_tolerance: bool | None
    problem: str | None
    #: The codes of the session's warning and error flags (info flags left out), as ``show``
    #: and the console list them.
    flags: tuple[str, ...] = ()
    #: "full calibration" (the plan measures k_pol and k_s) or "output check" (they are carried).
    kind: str = ""
    #: unreviewed, approved or rejected (a rejected session is listed only with include_all).
    review: str = UNREVIEWED
    session_uuid: str | None = None  # the session's id across stations
    #: The expanded uncertainty of the session's dose, %, drawn as the point's bar.
    U_expanded_pct: float | None = None
    #: The station's name, when the history spans several stations (their ids may repeat),
    #: with the start of its UUID where stations share the name.
    station: str | None = None
    #: The session this one replayed (listed only with include_all), else None.
    replay_of: int | None = None

    @property
    def shown_status(self) -> str:
        """Return the status as the table shows it: with the review, and what a replay
        reproduced ("finished, replay of 12")."""
        status = self.status if self.review == UNREVIEWED else f"{self.status}, {self.review}"
        return status if self.replay_of is None else f"{status}, replay of {self.replay_of}"

    @property
    def label(self) -> str:
        """Return the session's id, after its station's name when from several stations."""
        return str(self.session_id) if self.station is None else f"{self.station}:{self.session_id}"


@dataclass(frozen=True)
class History:
    """A beam's sessions in time order, with the baseline they are compared with."""

    beam: str
    machine: str | None
    baseline: str
    baseline_label: str
    baseline_cGy_per_MU: float | None
    points: tuple[HistoryPoint, ...]
    station_uuid: str | None = None  # the station that keeps the sessions
    #: When no session matches: the beams recorded at the station, the closest names first.
    known_beams: tuple[str, ...] = ()
    #: The beam's action level, %, from the station's registers (None: not registered).
    action_pct: float | None = None
    #: The register row of the beam asked for (id, name), when the registers hold it.
    register_beam: tuple[int, str] | None = None

    @property
    def tolerance_pct(self) -> float | None:
        """Return the tolerance of the latest session with one (for drawing the band)."""
        known = [p.tolerance_pct for p in self.points if p.tolerance_pct is not None]
        return known[-1] if known else None


def parse_baseline(text: str) -> str | int | float:
    """Return a baseline choice: a word, a session id (int) or a dose per MU (float)."""
    cleaned = text.strip().lower()
    if cleaned in BASELINE_WORDS:
        return cleaned
    if cleaned.startswith("session:"):
        try:
            return int(cleaned.removeprefix("session:"))
        except ValueError:
            raise InputError("baseline", text, BASELINE_ALLOWED, "is not a session id") from None
    try:
        value = float(cleaned)
    except ValueError:
        raise InputError("baseline", text, BASELINE_ALLOWED, "is not known") from None
    from chargebook.corrections import limits

    return float(limits.EXPECTED_CGY_PER_MU.check("baseline", value))


@dataclass(frozen=True)
class _Entry:
    """One session of a history, as listed: its row, names, result and review."""

    session: SessionRow
    #: What the history shows of its metadata: the names (``RecordReader.session_names``),
    #: or the whole decoded metadata when the caller has it.
    names: Mapping[str, Any]
    result: ResultSummary
    review: Review | None
    station: StationRow

    @functools.cached_property
    def metadata(self) -> dict[str, Any]:
        """Return the session's metadata, decoded when first asked for (most are never)."""
        return self.session.metadata()


def _entries(
    store: RecordReader, rows: Sequence[tuple[SessionRow, Mapping[str, Any]]]
) -> list[_Entry]:
    """Return the sessions ``rows`` (each with its names or its decoded metadata) with their
    results (stored when current, else evaluated now: ``stored_result``) and reviews, read in a
    few queries however many sessions."""
    results = results_of(store, [row.id for row, _ in rows])
    reviews = store.events_of_kind(EventKind.SESSION_REVIEWED) if rows else {}
    station = store.station()
    return [
        _Entry(row, meta, results[row.id], review_of(reviews.get(row.id, [])), station)
        for row, meta in rows
    ]


def _point(
    entry: _Entry, baseline_cGy_per_MU: float | None, station: str | None = None
) -> HistoryPoint:
    result = entry.result
    meta = entry.names
    per_MU = result.dose_per_MU_cGy
    tolerance = result.tolerance_pct
    if baseline_cGy_per_MU is None:  # the session's own deviation, as its evaluation judged it
        deviation, within = result.deviation_pct, result.within_tolerance
    else:
        deviation, within = _against(per_MU, baseline_cGy_per_MU, tolerance)
    if deviation is None or tolerance is None:
        within = None
    problem = result.error
    if problem is None and per_MU is None:
        problem = "dose per MU pending (a factor or reading set is missing)"
    return HistoryPoint(
        session_id=entry.session.id,
        created_at=entry.session.created_at,
        status=entry.session.status,
        machine=str(meta.get("treatment_machine", "")),
        beam=str(meta.get("beam", entry.session.beam)),
        dose_per_MU_cGy=per_MU,
        expected_cGy_per_MU=result.expected_cGy_per_MU,
        deviation_pct=deviation,
        tolerance_pct=tolerance,
        within_tolerance=within,
        problem=problem,
        flags=tuple(code for code, _ in result.flags),
        kind=_plan_kind(entry.session.plan_json),
        review=review_status(entry.review),
        session_uuid=entry.session.uuid,
        U_expanded_pct=result.U_expanded_pct,
        station=station,
        replay_of=entry.session.replay_of,
    )


def _against(
    per_MU: float | None, baseline_cGy_per_MU: float, tolerance_pct: float | None
) -> tuple[float | None, bool | None]:
    """Return the deviation, %, of a dose per MU from a baseline chosen for the history, and
    whether it is within the tolerance (None where either is unknown). The physics is imported
    here, only when a baseline other than each session's expected output is asked for."""
    from chargebook.corrections import dose

    if per_MU is None:
        return None, None
    deviation = float(dose.deviation_pct(per_MU, baseline_cGy_per_MU))
    if tolerance_pct is None:
        return deviation, None
    return deviation, bool(dose.within_tolerance(deviation, tolerance_pct))


@functools.lru_cache(maxsize=64)
def _plan_kind(plan_json: str) -> str:
    """Return the kind of session a stored plan makes (``session_kind``), each distinct plan
    decoded once: a station's thousands of sessions follow a few plans."""
    return session_kind(json.loads(plan_json))


def _baseline_value(
    choice: str | int | float, stores: Sequence[RecordReader], entries: list[_Entry]
) -> tuple[float | None, str]:
    """Return (baseline dose per MU or None for 'expected', and a label saying what it is)."""
    if choice == "expected":
        return None, "each session's expected output"
    counted = [e for e in entries if _counted(e)]
    values = [
        (e, e.result.dose_per_MU_cGy) for e in counted if e.result.dose_per_MU_cGy is not None
    ]
    if isinstance(choice, float):
        return choice, f"{choice:g} cGy/MU"
    if isinstance(choice, int):
        value = _baseline_entry(stores, choice).result.dose_per_MU_cGy
        if value is None:
            problem = "has no dose per MU"
            raise InputError("baseline", f"session:{choice}", "a session with a result", problem)
        return value, f"session {choice} ({value:.4f} cGy/MU)"
    if not values:
        problem = "has no data"
        if len(counted) < len(entries):  # --all lists more than a baseline counts
            problem += " (it counts only finished, unrejected sessions that are not replays)"
        raise InputError("baseline", choice, "expected, when no session has a result", problem)
    if choice == "first":
        first, value = values[0]
        label = f"the first session, {_name(first, stores)} ({value:.4f} cGy/MU)"
        return value, label + _NOT_COUNTED if len(counted) < len(entries) else label
    import statistics  # only for this baseline: it brings fractions and decimal

    mean = statistics.fmean(v for _, v in values)
    sessions = f"{len(values)} session{'' if len(values) == 1 else 's'}"
    label = f"the mean of {sessions} ({mean:.4f} cGy/MU)"
    return mean, label + _NOT_COUNTED if len(counted) < len(entries) else label


#: Said after a first or mean baseline when the history lists sessions it does not count.
_NOT_COUNTED = "; finished sessions only: replays and open, aborted or rejected ones not counted"


def _counted(entry: _Entry) -> bool:
    """Return True for a session a first or mean baseline counts: one a history lists without
    include_all (finished, not a replay, not rejected). A replay reproduces its original's
    result, so counting it would count that session twice."""
    return _listed(entry.session, False) and review_status(entry.review) != "rejected"


def _name(entry: _Entry, stores: Sequence[RecordReader]) -> str:
    """Return a session's id, after its station's label when from several stations."""
    if len(stores) == 1:
        return str(entry.session.id)
    label = station_labels(stations_of(stores))[entry.station.uuid]
    return f"{label}:{entry.session.id}"


def _baseline_entry(stores: Sequence[RecordReader], session_id: int) -> _Entry:
    """Return the baseline session ``session_id``: InputError when no station holds it, or
    several do (ids repeat across stations: --station chooses one)."""
    found = []
    for store in stores:
        with contextlib.suppress(NotFound):
            row = store.session(session_id)
            found += _entries(store, [(row, row.metadata())])
    if len(found) == 1:
        return found[0]
    text = f"session:{session_id}"
    if not found:
        raise InputError("baseline", text, "a session recorded here", "is not recorded")
    choices = station_choices(stations_of(stores))
    names = ", ".join(choices[e.station.uuid] for e in found)
    raise InputError("baseline", text, f"one station's session (--station {names})", "is ambiguous")


def load_history(
    store: RecordReader,
    beam: str,
    machine: str | None = None,
    baseline: str = "expected",
    include_all: bool = False,
) -> History:
    """Return the output history of ``beam``: finished, non-replay sessions not rejected by a
    review, unless ``include_all`` (then every session, a rejected one marked)."""
    return load_history_across([store], beam, machine, baseline, include_all)


def load_history_across(
    stores: Sequence[RecordReader],
    beam: str,
    machine: str | None = None,
    baseline: str = "expected",
    include_all: bool = False,
) -> History:
    """Return :func:`load_history` over the sessions of several stations (a department
    record), in the order they started, each point naming its station when there are several."""
    choice = parse_baseline(baseline)
    entries: list[_Entry] = []
    known: list[str] = []
    # Each station's session names, read once (a listing of thousands of sessions) if needed.
    names_of = functools.cache(lambda index: stores[index].session_names())
    beam, machine = _machine_named_first(stores, beam, machine, names_of)
    found, refusals = _register_beams(stores, beam, machine)
    registered = next((here for here in found if here is not None), None)
    # A station whose registers do not name the beam (or that has none) matches its typed
    # sessions by the names typed, or those another station's registers gave: "DEMO-LA1 6 MV"
    # is machine DEMO-LA1, beam 6 MV at every station of a department.
    typed = [(beam, machine)] + ([] if registered is None else [registered.names])
    for store, here in zip(stores, found, strict=True):
        if here is None:  # matched on the names, read without decoding each one's metadata
            rows = _typed_rows(store, typed, include_all)
        else:
            listed = [row for row in store.sessions() if _listed(row, include_all)]
            decoded = ((row, row.metadata()) for row in listed)
            rows = [(row, meta) for row, meta in decoded if here.matches(row, meta)]
        entries += _entries(store, rows)
        known += [] if rows else [b for b in _beams_like(store, beam) if b not in known]
    if refusals and not entries:  # no station measured it: say what the registers hold
        raise refusals[0]
    if registered is not None:
        beam, machine = registered.beam, registered.machine
    if not include_all:
        entries = [e for e in entries if review_status(e.review) != "rejected"]
    entries.sort(key=lambda entry: entry.session.created_at)
    value, label = _baseline_value(choice, stores, entries)
    labels = station_labels(stations_of(stores)) if len(stores) > 1 else {}
    return History(
        beam=beam,
        machine=machine,
        baseline=baseline,
        baseline_label=label,
        baseline_cGy_per_MU=value,
        points=tuple(_point(e, value, labels.get(e.station.uuid)) for e in entries),
        station_uuid=stores[0].station().uuid if len(stores) == 1 else None,
        known_beams=() if entries or not known else tuple(known),
        action_pct=_action_pct(registered, entries),
        register_beam=None if registered is None else (registered.row_id, registered.name),
    )


def _listed(row: SessionRow | ListedSession, include_all: bool) -> bool:
    """Return True for a session a history lists: finished and not a replay, unless all."""
    return include_all or (row.status == "finished" and row.replay_of is None)


def _typed_rows(
    store: RecordReader, typed: Sequence[tuple[str, str | None]], include_all: bool
) -> list[tuple[SessionRow, Mapping[str, Any]]]:
    """Return the listed sessions that measured one of the beams ``typed`` ((beam, machine)
    pairs), each with the names it was matched on: matched on the names the listing reads (the
    metadata decoded only of a session whose names are not all text), then the whole rows of
    those sessions alone read, in one query, not the metadata and plan of the station's
    thousands."""
    listed = [row for row in store.listed_sessions() if _listed(row, include_all)]
    unnamed = [row.id for row in listed if row.names is None]
    decoded = {row.id: row.metadata() for row in store.sessions_of(unnamed)} if unnamed else {}
    judge = _typed_judge(typed)
    named = ((row, decoded[row.id] if row.names is None else row.names) for row in listed)
    matched = [(row.id, names) for row, names in named if judge(row, names)]
    whole = {row.id: row for row in store.sessions_of(session_id for session_id, _ in matched)}
    return [(whole[session_id], names) for session_id, names in matched]


def _typed_judge(
    typed: Sequence[tuple[str, str | None]],
) -> Callable[[SessionRow | ListedSession, Mapping[str, Any]], bool]:
    """Return a test of whether a session (its row and names) measured one of the beams
    ``typed`` ((beam, machine) pairs, as :func:`matches` takes them). A station's thousands of
    sessions name a few machines and beams: each distinct set of names is judged once."""
    judged: dict[tuple[object, object, object], bool] = {}

    def judge(row: SessionRow | ListedSession, meta: Mapping[str, Any]) -> bool:
        key = (row.beam, meta.get("beam"), meta.get("treatment_machine"))  # what matches reads
        try:
            return judged[key]
        except KeyError:
            found = judged[key] = any(matches(row, b, m, meta) for b, m in typed)
        except TypeError:  # a name that is not text (a list, say): judged on its own
            found = any(matches(row, b, m, meta) for b, m in typed)
        return found

    return judge


def _action_pct(registered: _RegisteredBeam | None, entries: list[_Entry]) -> float | None:
    """Return the action level to draw, %: the registers' beam row as it is now, else (a
    department record, or sessions typed before the registers) the latest session's own."""
    if registered is not None and registered.action_pct is not None:
        return registered.action_pct
    for entry in reversed(entries):
        # json.dumps writes keys as they are: metadata whose text names neither key has none
        text = entry.session.metadata_json
        if "action_level_pct" in text or "action_pct" in text:
            level = action_level_pct(entry.metadata)
            if level is not None:
                return level
    return None


@dataclass(frozen=True)
class _RegisteredBeam:
    """A beam of the station's registers and how its sessions are recognised."""

    row_id: int
    entry_id: int
    name: str  # "DEMO-LA1 6 MV"
    machine: str
    beam: str
    action_pct: float | None

    @property
    def names(self) -> tuple[str, str]:
        """Return the beam's name and its machine's, as a typed session names them."""
        return self.beam, self.machine

    def matches(self, row: SessionRow, meta: dict[str, Any]) -> bool:
        """Return True for a session (``meta``: its metadata) that named this beam's register
        entry, or (recorded before the registers, or typed) its machine and beam, spaces and
        case aside."""
        named = (meta.get("register_copy") or {}).get("beam")
        if named is not None:
            return named.get("entry_id") == self.entry_id
        return _squeezed(meta.get("treatment_machine")) == _squeezed(self.machine) and (
            _squeezed(meta.get("beam") or row.beam) == _squeezed(self.beam)
        )


def _machine_named_first(
    stores: Sequence[RecordReader],
    beam: str,
    machine: str | None,
    names_of: Callable[[int], dict[int, dict[str, str | None]]],
) -> tuple[str, str | None]:
    """Return (beam, machine) with a machine that sessions recorded split off the front of
    ``beam``, as the registers name a beam ("DEMO-LA1 10 MV": beam 10 MV on DEMO-LA1), so a
    beam typed in its sessions is found by that name too; unchanged when ``machine`` is given
    or no recorded machine begins ``beam``. ``names_of(i)``: station i's session names."""
    words = beam.casefold().split()
    if machine is not None:
        return beam, machine
    for index in range(len(stores)):
        for names in names_of(index).values():
            known = str(names.get("treatment_machine") or "").split()
            if (
                known
                and len(words) > len(known)
                and words[: len(known)] == [word.casefold() for word in known]
            ):
                return " ".join(beam.split()[len(known) :]), " ".join(known)
    return beam, machine


def _squeezed(text: object) -> str:
    return "".join(str(text or "").split()).casefold()


def _register_beams(
    stores: Sequence[RecordReader], text: str, machine: str | None
) -> tuple[list[_RegisteredBeam | None], list[InputError]]:
    """Return each station's registers' beam named by ``text`` (None where they name none),
    and the refusals of the stations whose registers do not know it. One station's refusal
    stands alone; among several, a station that does not know a beam another one measured is
    left out of its history, not a reason to refuse it."""
    found: list[_RegisteredBeam | None] = []
    refusals: list[InputError] = []
    for store in stores:
        try:
            found.append(_register_beam(store, text, machine))
        except InputError as error:
            if len(stores) == 1:
                raise
            found.append(None)
            refusals.append(error)
    return found, refusals


def _register_beam(store: RecordReader, text: str, machine: str | None) -> _RegisteredBeam | None:
    """Return the registers' beam named by ``text`` (its id or name), or None when the station
    has no beams registered, or when none matches but typed sessions do (recorded before the
    registers). InputError listing the close matches when neither does."""
    from chargebook.acquire.record.registers import register_rows

    if not register_rows(store, "beam"):
        return None
    from chargebook.acquire.session.register_rows import find_beam, row_name

    wanted = text if machine is None else f"{machine} {text}"
    try:
        row = find_beam(store, wanted)
    except InputError:
        if any(matches(session, text, machine) for session in store.sessions()):
            return None
        raise
    name = row_name(store, row)
    return _RegisteredBeam(
        row_id=row.id,
        entry_id=row.entry_id,
        name=name,
        machine=name.removesuffix(f" {row.fields['name']}"),
        beam=str(row.fields["name"]),
        action_pct=row.fields.get("action_pct"),
    )


def _no_match(history: History) -> str:
    """Return what history says when no session matches, with the beams that do exist."""
    words = f"No session of beam {history.beam!r} matches."
    if history.known_beams:
        words += f" Beams recorded here: {', '.join(history.known_beams)}."
    return words


def _beams_like(store: RecordReader, beam: str) -> tuple[str, ...]:
    """Return the beams recorded at the station, those whose names are close to ``beam``
    first (a mistyped "7 MV" finds "6 MV")."""
    import difflib

    names = sorted(
        {
            " ".join(str(row.metadata().get("beam") or row.beam).split())
            for row in store.sessions()
            if row.replay_of is None
        }
    )
    close = difflib.get_close_matches(beam, names, n=len(names), cutoff=0.5)
    return (*close, *(name for name in names if name not in close))


#: Marks an output check's session id in the terminal plot, and the legend saying so.
OUTPUT_CHECK_MARK = "*"
OUTPUT_CHECK_LEGEND = (
    f"{OUTPUT_CHECK_MARK} after a session id: an output check (k_pol, k_s carried)"
)


def plot_labels(history: History) -> tuple[list[str], str | None]:
    """Return the session ids to label the plot's columns (output checks marked), and the
    legend line for the mark (None when no output check is listed)."""
    labels = [
        f"{p.label}{OUTPUT_CHECK_MARK if p.kind == OUTPUT_CHECK else ''}" for p in history.points
    ]
    marked = any(p.kind == OUTPUT_CHECK for p in history.points)
    return labels, OUTPUT_CHECK_LEGEND if marked else None


def history_table(history: History) -> Table:
    """Return the history as a table: one row per session."""
    within = {None: "—", True: "yes", False: "NO"}
    rows = tuple(
        (
            p.label,
            when(p.created_at),
            p.machine,
            p.shown_status,
            p.kind,
            number(p.dose_per_MU_cGy, 4, "—"),
            number(p.expected_cGy_per_MU, 4, "—"),
            signed(p.deviation_pct, 2, "—"),
            "—" if p.tolerance_pct is None else f"±{p.tolerance_pct:g}",
            within[p.within_tolerance],
            ", ".join(p.flags) or "none",
            p.problem or "",
        )
        for p in history.points
    )
    return Table(
        f"Output history: {history.beam}" + (f" on {history.machine}" if history.machine else ""),
        (
            "session",
            "date",
            "machine",
            "status",
            "kind",
            "dose/MU (cGy/MU)",
            "expected",
            "deviation (%)",
            "tolerance (%)",
            "within",
            "flags",
            "note",
        ),
        rows,
        tuple(f"session-{p.session_id}" for p in history.points),
        note=f"Deviation from {history.baseline_label}."
        if rows
        else f"No session of beam {history.beam!r} matches."
        + (
            f" Beams recorded here: {', '.join(history.known_beams)}."
            if history.known_beams
            else ""
        ),
    )
