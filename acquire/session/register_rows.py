"""The fields of each kind of register row, checked before a row is stored, and what a session
takes from the rows it names.

``FIELDS[kind]`` declares each field as data (name, type, unit or choices, required, words).
:func:`add_row` and :func:`supersede_row` check every field, naming the one that is wrong, before
anything is written (:mod:`chargebook.acquire.record.registers` stores them). Values may come as
JSON values (an RPC) or as text (the command line's ``key=value``).

A reference to another row (a certificate's chamber, a beam's machine, a k_Q's chamber and beam)
is stored as that row's *entry* id, so superseding the chamber does not orphan its certificates.

:func:`select` gathers the rows a session uses (beam, chamber, electrometer, and the chamber's
certificate and k_Q for that beam, found when not named), checks that they belong together,
and gives the session metadata they fill, a copy of the rows, and warnings in words: a missing
or expired certificate (valid :data:`CERTIFICATE_VALIDITY_YEARS` years by default: common
practice), no k_Q for this chamber and beam, an electrometer with no calibration.
"""

from __future__ import annotations

import datetime
import difflib
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from chargebook.acquire.record.registers import (
    KINDS,
    RegisterRow,
    append_register_row,
    entry_rows,
    register_row,
    register_rows,
)
from chargebook.acquire.record.store import Store
from chargebook.corrections import limits, units
from chargebook.corrections.carried import checked_text, parse_date
from chargebook.corrections.errors import InputError
from chargebook.corrections.stability import Thresholds

if TYPE_CHECKING:
    from chargebook.acquire.record.reader import RecordReader

#: A calibration certificate older than this is flagged (common practice: two years); the
#: daemon's setting is ``Thresholds.certificate_validity_years``.
CERTIFICATE_VALIDITY_YEARS = Thresholds().certificate_validity_years
MAX_TEXT = 200
BEAM_TYPES = ("pulsed", "pulsed-scanned", "continuous")
MODALITIES = ("photon", "electron", "proton", "other")
ENERGY_UNITS = {"photon": "MV", "electron": "MeV", "proton": "MeV", "other": "MeV"}


@dataclass(frozen=True, slots=True)
class FieldSpec:
    """One field of a register row: its type (text, number, date, past_date, yes_no, choice,
    ranges, or a kind of row it refers to), its range or choices, whether it is required."""

    name: str
    type: str
    words: str
    required: bool = False
    range: limits.Range | None = None
    choices: tuple[str, ...] = ()

    def allowed(self) -> str:
        """Return what the field accepts, in words."""
        if self.choices:
            return ", ".join(self.choices)
        if self.range is not None:
            return self.range.text()
        return {
            "text": f"a text of 1 to {MAX_TEXT} characters",
            "date": "a date written YYYY-MM-DD",
            "past_date": "a date written YYYY-MM-DD, not after today",
            "yes_no": "true or false",
            "ranges": "k_elec as a number, or RANGE:VALUE,RANGE:VALUE (0.9 to 1.1)",
        }.get(self.type, f"the id of a {self.type} row")


def _text(name: str, words: str, required: bool = False) -> FieldSpec:
    return FieldSpec(name, "text", words, required)


def _number(name: str, words: str, check: limits.Range, required: bool = False) -> FieldSpec:
    return FieldSpec(name, "number", words, required, range=check)


def _choice(name: str, words: str, choices: tuple[str, ...], required: bool = True) -> FieldSpec:
    return FieldSpec(name, "choice", words, required, choices=choices)


def _ref(kind: str, words: str) -> FieldSpec:
    return FieldSpec(kind, kind, words, True)


_SERIAL = _text("serial", "the serial number", required=True)
_MODEL = _text("model", "the maker's model")
_PROFILE = _text("profile", "the instrument profile it is read through")


def _sensor(quantity: str, unit: str, u_range: limits.Range) -> tuple[FieldSpec, ...]:
    return (
        _SERIAL,
        _MODEL,
        _PROFILE,
        FieldSpec("certificate_date", "past_date", "date of its calibration certificate"),
        _number(f"u_{unit}", f"standard uncertainty of a {quantity} reading", u_range),
        _number(
            f"correction_{unit}",
            f"the certificate's correction, added to each {quantity} reading",
            limits.Range(-5.0, 5.0, unit.replace("C", "°C")),
        ),
    )


FIELDS: dict[str, tuple[FieldSpec, ...]] = {
    "machine": (
        _text("name", "the machine's name in the clinic", required=True),
        _MODEL,
        _text("serial", "the serial number"),
    ),
    "beam": (
        _ref("machine", "the machine delivering it"),
        _text("name", "the beam's name, e.g. 6 MV", required=True),
        _choice("modality", "the kind of radiation", MODALITIES),
        _number("nominal_energy", "in MV (photons) or MeV", limits.Range(0.1, 300.0), True),
        _choice("beam_type", "for the recombination method", BEAM_TYPES),
        _number("TPR20_10", "photon beam quality TPR20,10", limits.Range(0.5, 0.85)),
        _number("pdd10x_pct", "photon beam quality %dd(10)x", limits.Range(55.0, 95.0, "%")),
        _number("R50_cm", "electron beam quality R50", limits.Range(1.0, 20.0, "cm")),
        FieldSpec("quality_measured_on", "past_date", "the day the beam quality was measured"),
        _text("phantom", "the reference phantom, e.g. water"),
        _number("depth_cm", "reference depth", limits.Range(0.1, 40.0, "cm")),
        _choice("setup", "source distance kept fixed", ("SSD", "SAD"), required=False),
        _number("distance_cm", "the SSD or SAD", limits.Range(50.0, 200.0, "cm")),
        _number("field_size_cm", "side of the square field", limits.Range(1.0, 40.0, "cm")),
        _number("expected_cGy_per_MU", "the expected output", limits.EXPECTED_CGY_PER_MU),
        _number("tolerance_pct", "tolerance level", limits.TOLERANCE_PCT),
        _number("action_pct", "action level", limits.TOLERANCE_PCT),
    ),
    "chamber": (
        _MODEL,
        _SERIAL,
        _choice("type", "chamber type", ("cylindrical", "plane-parallel")),
        _number("cavity_volume_cm3", "cavity volume", limits.Range(0.001, 1000.0, "cm³")),
    ),
    "certificate": (
        _ref("chamber", "the chamber calibrated"),
        _number(
            "N_Dw",
            "the calibration coefficient N_D,w, in N_Dw_unit",
            limits.Range(1e-12, 1e12),
            True,
        ),
        _choice("N_Dw_unit", "the unit of N_Dw", tuple(units.N_DW_UNITS)),
        _text("laboratory", "the calibration laboratory", required=True),
        _text("number", "the certificate number", required=True),
        FieldSpec("date", "past_date", "the date of calibration", True),
        _number("U_pct", "expanded uncertainty of N_D,w", limits.UNCERTAINTY_PCT, True),
        _number("coverage_k", "its coverage factor", limits.CERTIFICATE_K, True),
        _text("reference_quality", "the laboratory's reference beam quality, e.g. Co-60", True),
        FieldSpec("includes_k_s", "yes_no", "the laboratory's N_D,w already includes k_s"),
        FieldSpec("includes_k_pol", "yes_no", "the laboratory's N_D,w already includes k_pol"),
    ),
    "electrometer": (
        _MODEL,
        _SERIAL,
        _PROFILE,
        FieldSpec("k_elec", "ranges", "k_elec, one value or per range"),
        _number("u_k_elec_pct", "standard uncertainty of k_elec", limits.UNCERTAINTY_PCT),
        _text("certificate_number", "the electrometer's certificate"),
        FieldSpec("certificate_date", "past_date", "the date of its calibration"),
        FieldSpec("calibrated_with_chamber", "yes_no", "calibrated together with the chamber"),
    ),
    "thermometer": _sensor("temperature", "C", limits.U_TEMPERATURE_C),
    "barometer": _sensor("pressure", "kPa", limits.U_PRESSURE_KPA),
    "k_Q": (
        _ref("chamber", "the chamber"),
        _ref("beam", "the beam"),
        _number("value", "k_Q", limits.K_Q, True),
        _text("source", "the code of practice's table, or the user's own determination", True),
        _number("u_pct", "standard uncertainty of k_Q", limits.UNCERTAINTY_PCT, True),
    ),
}
assert set(FIELDS) == set(KINDS)


def fields_help(kind: str) -> str:
    """Return the fields of ``kind``, one a line: name, what it accepts, required or not."""
    lines = []
    for spec in _specs(kind):
        need = "required" if spec.required else "optional"
        lines.append(f"  {spec.name:<22} {spec.words} ({spec.allowed()}; {need})")
    return "\n".join(lines)


def _specs(kind: str) -> tuple[FieldSpec, ...]:
    if kind not in FIELDS:
        raise InputError("kind", kind, ", ".join(KINDS), "is not a kind of register row")
    return FIELDS[kind]


_YES = {"true": True, "yes": True, "1": True, "false": False, "no": False, "0": False}


def _value(spec: FieldSpec, field_name: str, value: Any, today: datetime.date, store: Store) -> Any:
    """Return one field's value checked and in its stored form."""
    kind = spec.type
    if kind == "text":
        return checked_text(field_name, value, MAX_TEXT)
    if kind == "number":
        assert spec.range is not None
        return float(spec.range.check(field_name, _from_text(value)))
    if kind == "choice":
        if value not in spec.choices:
            raise InputError(field_name, value, spec.allowed(), "is not known")
        return value
    if kind in ("date", "past_date"):
        day = parse_date(field_name, value)
        if kind == "past_date" and day > today:
            raise InputError(
                field_name, day.isoformat(), f"a date up to today, {today}", "is in the future"
            )
        return day.isoformat()
    if kind == "yes_no":
        if isinstance(value, str) and value.strip().lower() in _YES:
            return _YES[value.strip().lower()]
        if not isinstance(value, bool):
            raise InputError(field_name, value, spec.allowed(), "is not a yes/no value")
        return value
    if kind == "ranges":
        return _ranges(field_name, value)
    return _reference(store, field_name, spec.type, value)


def _from_text(value: Any) -> Any:
    if isinstance(value, str):
        try:
            return float(value)
        except ValueError:
            return value
    return value


def _ranges(field_name: str, value: Any) -> dict[str, float]:
    """Return k_elec per range ({"all": k} for one value)."""
    if isinstance(value, str) and ":" in value:
        pairs = [part.split(":", 1) for part in value.split(",")]
        value = {name.strip(): number for name, number in pairs}
    if not isinstance(value, Mapping):
        value = {"all": value}
    return {
        checked_text(f"{field_name}.range", name, 40): float(
            limits.K_ELEC.check(f"{field_name}.{name}", _from_text(number))
        )
        for name, number in value.items()
    }


def _reference(store: Store, field_name: str, kind: str, value: Any) -> int:
    """Return the entry id of the ``kind`` row ``value`` names; InputError when none does."""
    row_id = _from_text(value)
    if isinstance(row_id, float) and row_id.is_integer():
        row_id = int(row_id)
    if isinstance(row_id, bool) or not isinstance(row_id, int):
        raise InputError(field_name, value, f"the id of a {kind} row", "is not a row id")
    try:
        row = register_row(store, row_id)
    except LookupError:
        raise InputError(
            field_name, value, f"the id of a {kind} row", "is not in the registers"
        ) from None
    if row.kind != kind:
        raise InputError(field_name, value, f"the id of a {kind} row", f"is a {row.kind} row")
    return row.entry_id


def check_fields(
    store: Store, kind: str, given: Mapping[str, Any], today: datetime.date
) -> dict[str, Any]:
    """Return the fields of a ``kind`` row checked and in stored form; InputError naming the
    first field that is missing, unknown or wrong."""
    specs = {spec.name: spec for spec in _specs(kind)}
    for name, value in given.items():
        if name not in specs:
            raise InputError(
                name, value, "one of " + ", ".join(specs), f"is not a field of a {kind} row"
            )
    checked: dict[str, Any] = {}
    for name, spec in specs.items():
        value = given.get(name)
        if value is None or (isinstance(value, str) and not value.strip() and spec.type != "text"):
            if spec.required:
                raise InputError(name, None, spec.allowed(), "is missing")
            continue
        checked[name] = _value(spec, name, value, today, store)
    _CROSS_CHECKS.get(kind, _nothing)(checked)
    return checked


def _nothing(checked: dict[str, Any]) -> None:
    return None


def _check_beam(checked: dict[str, Any]) -> None:
    modality = checked["modality"]
    photon_quality = [name for name in ("TPR20_10", "pdd10x_pct") if name in checked]
    if modality == "photon" and "R50_cm" in checked:
        raise InputError(
            "R50_cm", checked["R50_cm"], "TPR20_10 or pdd10x_pct", "is an electron beam quality"
        )
    if modality == "electron" and photon_quality:
        name = photon_quality[0]
        raise InputError(name, checked[name], "R50_cm", "is a photon beam quality")
    if modality == "electron" and "R50_cm" not in checked:
        raise InputError("R50_cm", None, "R50 in cm, 1 to 20", "is missing for an electron beam")
    if modality == "photon" and not photon_quality:
        raise InputError("TPR20_10", None, "TPR20_10 or pdd10x_pct", "is missing for a photon beam")
    if "quality_measured_on" not in checked:
        raise InputError(
            "quality_measured_on", None, "the date the beam quality was measured", "is missing"
        )
    tolerance, action = checked.get("tolerance_pct"), checked.get("action_pct")
    if tolerance is not None and action is not None and action < tolerance:
        raise InputError("action_pct", action, f"at least the tolerance, {tolerance:g} %")


def _check_electrometer(checked: dict[str, Any]) -> None:
    if checked.get("calibrated_with_chamber") and "k_elec" in checked:
        raise InputError(
            "k_elec",
            checked["k_elec"],
            "no k_elec for an electrometer calibrated with the chamber",
            "is given as well",
        )


def _check_certificate(checked: dict[str, Any]) -> None:
    """Refuse an N_D,w outside the plausible range once converted to Gy/nC."""
    units.N_Dw_Gy_per_nC(checked["N_Dw"], checked["N_Dw_unit"])


_CROSS_CHECKS: dict[str, Callable[[dict[str, Any]], None]] = {
    "beam": _check_beam,
    "certificate": _check_certificate,
    "electrometer": _check_electrometer,
}


def _today(today: datetime.date | None) -> datetime.date:
    return today or datetime.datetime.now(datetime.UTC).date()


def _effective(effective_from: Any, today: datetime.date) -> str:
    return (
        today.isoformat()
        if effective_from is None
        else parse_date("effective_from", effective_from).isoformat()
    )


#: The fields that name an entry among the current ones of its kind: one chamber, electrometer,
#: thermometer or barometer per serial, one machine per name, one beam per name on its machine.
_IDENTITY: dict[str, tuple[str, ...]] = {
    "machine": ("name",),
    "beam": ("machine", "name"),
    **dict.fromkeys(("chamber", "electrometer", "thermometer", "barometer"), ("serial",)),
}
#: The references that say what a row belongs to: a certificate to its chamber, a k_Q to its
#: chamber and beam. A superseding row keeps them (a new owner is a new entry).
_OWNERS: dict[str, tuple[str, ...]] = {"certificate": ("chamber",), "k_Q": ("chamber", "beam")}


def _identity(fields: Mapping[str, Any], names: tuple[str, ...]) -> tuple[Any, ...]:
    """Return the identifying values, text compared without regard to case or spacing."""
    return tuple(
        " ".join(value.split()).casefold() if isinstance(value, str) else value
        for value in (fields.get(name) for name in names)
    )


def _refuse_duplicate(
    store: Store, kind: str, checked: Mapping[str, Any], entry_id: int | None = None
) -> None:
    """Raise InputError when another entry's current ``kind`` row has the same identity (its
    serial, or its name), naming that row; ``entry_id`` is the entry being superseded."""
    names = _IDENTITY.get(kind)
    if names is None:
        return
    wanted = _identity(checked, names)
    for row in register_rows(store, kind):
        if row.entry_id != entry_id and _identity(row.fields, names) == wanted:
            field_name = names[-1]
            raise InputError(
                field_name,
                checked[field_name],
                f"a {field_name} no current {kind} row holds",
                f"is already registered as row {row.id} ({kind} {row_name(store, row)}): "
                "supersede it",
            )


def _refuse_new_owner(old: RegisterRow, checked: Mapping[str, Any]) -> None:
    """Raise InputError naming the field when a superseding row names another owner."""
    for field_name in _OWNERS.get(old.kind, ()):
        if checked.get(field_name) != old.fields.get(field_name):
            raise InputError(
                field_name,
                checked.get(field_name),
                f"{old.fields.get(field_name)}, the {field_name} that row {old.id} belongs to",
                f"would move a {old.kind} to another {field_name}; add a new {old.kind} instead",
            )


def add_row(
    store: Store,
    kind: str,
    given: Mapping[str, Any],
    *,
    actor: str,
    effective_from: Any = None,
    today: datetime.date | None = None,
) -> RegisterRow:
    """Check the fields of a new ``kind`` entry and store its first row; return it."""
    day = _today(today)
    checked = check_fields(store, kind, given, day)
    _refuse_duplicate(store, kind, checked)
    return append_register_row(
        store, kind, checked, actor=actor, effective_from=_effective(effective_from, day)
    )


def supersede_row(
    store: Store,
    row_id: int,
    changes: Mapping[str, Any],
    *,
    actor: str,
    reason: str,
    effective_from: Any = None,
    today: datetime.date | None = None,
) -> RegisterRow:
    """Store a row that supersedes ``row_id``: its fields with ``changes`` applied (a value of
    None or "" removes an optional field), checked again; return the new row."""
    day = _today(today)
    old = register_row(store, row_id)
    reason = checked_text("reason", reason, MAX_TEXT)
    merged = {**old.fields, **changes}
    checked = check_fields(
        store, old.kind, {k: v for k, v in merged.items() if v not in (None, "")}, day
    )
    _refuse_new_owner(old, checked)
    _refuse_duplicate(store, old.kind, checked, old.entry_id)
    effective = _effective(effective_from, day)
    if effective < old.effective_from:
        raise InputError(
            "effective_from",
            effective,
            f"{old.effective_from} or later",
            f"is before row {old.id}'s",
        )
    return append_register_row(
        store,
        old.kind,
        checked,
        actor=actor,
        effective_from=effective,
        supersedes=old.id,
        reason=reason,
    )


# ------------------------------------------------------------------------------------ naming


def row_name(store: RecordReader, row: RegisterRow) -> str:
    """Return a row's name in words: "beam DEMO-LA1 6 MV", "chamber SIM-CH-0001" ..."""
    fields = row.fields
    if row.kind == "beam":
        machine = _current(store, fields["machine"]).fields["name"]
        return f"{machine} {fields['name']}"
    if row.kind == "machine":
        return str(fields["name"])
    if row.kind == "certificate":
        return f"{fields['number']} ({fields['laboratory']}, {fields['date']})"
    if row.kind == "k_Q":
        return f"{fields['value']:g} ({fields['source']})"
    return str(fields["serial"])


def _current(store: RecordReader, entry_id: int) -> RegisterRow:
    return entry_rows(store, entry_id)[-1]


def _squeeze(text: str) -> str:
    return re.sub(r"[\s_\-]+", "", text).casefold()


def find_beam(store: RecordReader, text: str | int) -> RegisterRow:
    """Return the current beam row named by ``text``: a row id, or a name with or without its
    machine ("DEMO-LA1 6 MV", "6MV": spaces and case do not matter). InputError listing the
    close matches (or every beam) when none or several match."""
    beams = register_rows(store, "beam")
    names = {row.id: row_name(store, row) for row in beams}
    if isinstance(text, int) or str(text).strip().isdigit():
        row_id = int(text)
        for row in register_rows(store, "beam", include_superseded=True):
            if row.id == row_id:
                return _current(store, row.entry_id)
    wanted = _squeeze(str(text))
    found = [
        row for row in beams if wanted in (_squeeze(names[row.id]), _squeeze(row.fields["name"]))
    ]
    if len(found) == 1:
        return found[0]
    every = sorted(names.values())
    if found:
        allowed = "one of " + ", ".join(names[row.id] for row in found)
        raise InputError("beam", text, allowed, "names several beams of the registers")
    close = difflib.get_close_matches(str(text), every, n=5, cutoff=0.4)
    allowed = (
        "a beam of the registers, the closest being " + ", ".join(close)
        if close
        else "one of " + (", ".join(every) or "(no beams registered)")
    )
    raise InputError("beam", text, allowed, "is not a beam of the registers")


# --------------------------------------------------------------------------------- selection


@dataclass(frozen=True, slots=True)
class Selection:
    """The register rows a session uses, checked to belong together, as of the day ``on``."""

    on: datetime.date
    rows: dict[str, RegisterRow]
    names: dict[str, str] = field(default_factory=dict)
    validity_years: float = CERTIFICATE_VALIDITY_YEARS

    def ids(self) -> dict[str, int]:
        """Return kind -> row id, as the session's metadata keeps them."""
        return {kind: row.id for kind, row in self.rows.items()}

    def copy(self) -> dict[str, dict[str, Any]]:
        """Return kind -> the row as it is now (kept in the session: a later edit of the
        registers never changes an old record)."""
        return {
            kind: {**row.to_dict(), "name": self.names[kind]} for kind, row in self.rows.items()
        }

    def warnings(self) -> list[str]:
        """Return, in words, what a physicist should know before measuring with these rows."""
        found: list[str] = []
        chamber, beam = self.names["chamber"], self.names["beam"]
        certificate = self.rows.get("certificate")
        if certificate is None:
            found.append(f"chamber {chamber} has no calibration certificate in the registers")
        else:
            found += self._expired(
                f"the certificate {self.names['certificate']} of chamber {chamber}",
                certificate.fields["date"],
            )
        if "k_Q" not in self.rows:
            found.append(f"chamber {chamber} has no k_Q for beam {beam} in the registers")
        electrometer = self.rows["electrometer"].fields
        name = self.names["electrometer"]
        if not electrometer.get("calibrated_with_chamber"):
            if "k_elec" not in electrometer:
                found.append(
                    f"electrometer {name} has no calibration: "
                    "neither k_elec nor calibrated with the chamber"
                )
            elif "certificate_date" not in electrometer:
                found.append(f"electrometer {name} has k_elec without a certificate date")
            else:
                found += self._expired(
                    f"the calibration of electrometer {name}", electrometer["certificate_date"]
                )
        for kind in ("thermometer", "barometer"):
            if kind in self.rows:
                date = self.rows[kind].fields.get("certificate_date")
                what = f"{kind} {self.names[kind]}"
                if date is None:
                    found.append(f"{what} has no calibration certificate date")
                else:
                    found += self._expired(f"the certificate of {what}", date)
        return found

    def _expired(self, what: str, dated: str) -> list[str]:
        day = datetime.date.fromisoformat(dated)
        ends = _years_after(day, self.validity_years)
        if ends >= self.on:
            return []
        return [
            f"{what}, dated {dated}, is past its validity of {self.validity_years:g} years "
            f"(it ended on {ends})"
        ]

    def metadata_fields(self) -> dict[str, Any]:
        """Return the session metadata these rows fill (the keys of ``validate_metadata``)."""
        beam = self.rows["beam"].fields
        chamber = self.rows["chamber"].fields
        electrometer = self.rows["electrometer"].fields
        filled: dict[str, Any] = {
            "treatment_machine": self.names["beam"].removesuffix(f" {beam['name']}"),
            "beam": beam["name"],
            "beam_type": beam["beam_type"],
            "modality": beam["modality"],
            "beam_quality": _quality_words(beam),
            "chamber_model": chamber.get("model", chamber["serial"]),
            "chamber_serial": chamber["serial"],
            "chamber_type": chamber["type"],
            "electrometer_model": electrometer.get("model", electrometer["serial"]),
            "electrometer_serial": electrometer["serial"],
        }
        optional = {
            "R50_cm": beam.get("R50_cm"),
            "expected_cGy_per_MU": beam.get("expected_cGy_per_MU"),
            "tolerance_pct": beam.get("tolerance_pct"),
        }
        certificate = self.rows.get("certificate")
        if certificate is not None:
            c = certificate.fields
            optional |= {
                "N_Dw": c["N_Dw"],
                "N_Dw_unit": c["N_Dw_unit"],
                "u_N_Dw_pct_k2": c["U_pct"],
                "k_N_Dw": c["coverage_k"],
                "calibration_date": c["date"],
                "certificate": f"{c['number']}, {c['laboratory']}",
            }
        k_Q = self.rows.get("k_Q")
        if k_Q is not None:
            optional |= {
                "k_Q": k_Q.fields["value"],
                "u_k_Q_pct": k_Q.fields["u_pct"],
                "k_Q_source": k_Q.fields["source"],
            }
        k_elec = electrometer.get("k_elec", {})
        if len(k_elec) == 1:
            optional |= {
                "k_elec": next(iter(k_elec.values())),
                "u_k_elec_pct": electrometer.get("u_k_elec_pct"),
            }
        for kind, key in (("thermometer", "u_C"), ("barometer", "u_kPa")):
            if kind in self.rows:
                optional[f"u_{'temperature_C' if kind == 'thermometer' else 'pressure_kPa'}"] = (
                    self.rows[kind].fields.get(key)
                )
        return filled | {key: value for key, value in optional.items() if value is not None}


def _quality_words(beam: Mapping[str, Any]) -> str:
    for key, words in (
        ("TPR20_10", "TPR20,10 = {:g}"),
        ("pdd10x_pct", "%dd(10)x = {:g} %"),
        ("R50_cm", "R50 = {:g} cm"),
    ):
        if key in beam:
            return f"{words.format(beam[key])} (measured {beam['quality_measured_on']})"
    return ""


def _years_after(day: datetime.date, years: float) -> datetime.date:
    """Return the day ``years`` after ``day`` (whole years keep the calendar date)."""
    if float(years).is_integer():
        try:
            return day.replace(year=day.year + int(years))
        except ValueError:  # 29 February
            return day.replace(year=day.year + int(years), day=28)
    return day + datetime.timedelta(days=round(365.25 * years))


SESSION_KINDS = (
    "beam",
    "chamber",
    "electrometer",
    "certificate",
    "k_Q",
    "thermometer",
    "barometer",
)


def select(
    store: Store,
    ids: Mapping[str, Any],
    *,
    on: datetime.date,
    validity_years: float = CERTIFICATE_VALIDITY_YEARS,
) -> Selection:
    """Return the rows named by ``ids`` (kind -> row id; beam, chamber and electrometer
    required), with the chamber's newest certificate up to ``on`` and its k_Q for the beam
    found when not named. InputError naming the kind when a row is missing, of another kind,
    superseded, or not the chamber's or the beam's."""
    if not isinstance(ids, Mapping):
        raise InputError("registers", ids, "an object: kind -> row id", "is not an object")
    for kind in ids:
        if kind not in SESSION_KINDS:
            raise InputError(
                f"registers.{kind}",
                ids[kind],
                ", ".join(SESSION_KINDS),
                "is not a kind a session uses",
            )
    rows: dict[str, RegisterRow] = {}
    for kind in SESSION_KINDS:
        if ids.get(kind) is None:
            if kind in ("beam", "chamber", "electrometer"):
                raise InputError(f"registers.{kind}", None, f"the id of a {kind} row", "is missing")
            continue
        entry = _reference(store, f"registers.{kind}", kind, ids[kind])
        row = register_row(store, int(_from_text(ids[kind])))
        if not row.current:
            raise InputError(
                f"registers.{kind}",
                row.id,
                f"the current row, {_current(store, entry).id}",
                f"is superseded by row {row.superseded_by}",
            )
        rows[kind] = row
    chamber, beam = rows["chamber"].entry_id, rows["beam"].entry_id
    _belongs(rows, "certificate", {"chamber": chamber})
    _belongs(rows, "k_Q", {"chamber": chamber, "beam": beam})
    if "certificate" not in rows:
        dated = [
            r
            for r in register_rows(store, "certificate")
            if r.fields["chamber"] == chamber and r.fields["date"] <= on.isoformat()
        ]
        if dated:
            rows["certificate"] = max(dated, key=lambda r: (r.fields["date"], r.id))
    if "k_Q" not in rows:
        for row in register_rows(store, "k_Q"):
            if row.fields["chamber"] == chamber and row.fields["beam"] == beam:
                rows["k_Q"] = row
    names = {kind: row_name(store, row) for kind, row in rows.items()}
    return Selection(on, rows, names, validity_years)


def _belongs(rows: Mapping[str, RegisterRow], kind: str, owners: Mapping[str, int]) -> None:
    row = rows.get(kind)
    if row is None:
        return
    for owner, entry in owners.items():
        if row.fields[owner] != entry:
            raise InputError(
                f"registers.{kind}",
                row.id,
                f"a {kind} row of the session's {owner} (entry {entry})",
                f"is for another {owner} (entry {row.fields[owner]})",
            )


#: The metadata keys that name register rows, keep their copy and the warnings they raised.
REGISTER_KEYS = ("registers", "register_copy", "register_warnings")


def fill_from_registers(
    store: Store,
    metadata: Mapping[str, Any],
    *,
    on: datetime.date,
    validity_years: float = CERTIFICATE_VALIDITY_YEARS,
) -> dict[str, Any]:
    """Return ``metadata`` with what its ``registers`` (kind -> row id) name filled in, a copy
    of those rows (``register_copy``) and the warnings in words (``register_warnings``).

    Metadata without ``registers`` is returned as it is (typed in). A value typed in that
    differs from the registers' is refused by name: a session says one thing about its chamber.
    """
    result = dict(metadata)
    if result.get("registers") is None:
        for key in REGISTER_KEYS[1:]:
            result.pop(key, None)
        return result
    kept = result.get("register_copy")
    if isinstance(kept, Mapping) and {
        kind: row.get("id") for kind, row in kept.items() if isinstance(row, Mapping)
    } == dict(result["registers"]):
        return result  # a recorded session started again (a replay): its copy stands
    picked = select(store, result["registers"], on=on, validity_years=validity_years)
    for key, value in picked.metadata_fields().items():
        typed = result.get(key)
        if typed is not None and typed != value and key != "beam_quality":
            raise InputError(
                key, typed, f"{value!r}, as the registers hold it", "differs from the registers"
            )
        result[key] = value if typed is None or key != "beam_quality" else typed
    result["registers"] = picked.ids()
    result["register_copy"] = picked.copy()
    result["register_warnings"] = picked.warnings()
    return result


@dataclass(frozen=True, slots=True)
class SensorEntry:
    """An air entry read from a sensor, its certificate corrections applied: temperature in
    °C, pressure in kPa, and the source in words (serial, as read, corrections)."""

    temperature_C: float
    pressure_kPa: float
    source: str


def sensor_entry(
    store: Store,
    serial: str,
    profile: str,
    temperature_C: float,
    pressure_kPa: float,
    written: Mapping[str, str],
) -> SensorEntry:
    """Return the air entry of a sensor reading: the correction of the registers' current
    thermometer and barometer rows with the sensor's ``serial`` added (none: 0, said so)."""
    corrections: dict[str, float] = {}
    for kind, key in (("thermometer", "correction_C"), ("barometer", "correction_kPa")):
        for row in register_rows(store, kind):
            if row.fields["serial"] == serial and key in row.fields:
                corrections[key] = float(row.fields[key])
    dT, dP = corrections.get("correction_C"), corrections.get("correction_kPa")
    said = [f"{dT:+.2f} °C" if dT is not None else "none for the thermometer"]
    said.append(f"{dP:+.3f} kPa" if dP is not None else "none for the barometer")
    read = ", ".join(written.values())
    return SensorEntry(
        temperature_C=temperature_C + (dT or 0.0),
        pressure_kPa=pressure_kPa + (dP or 0.0),
        source=f"sensor {serial} ({profile}): read {read}; "
        f"certificate corrections from the registers: {', '.join(said)}",
    )
