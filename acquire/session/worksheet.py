"""Worksheets: readings copied from a logbook, in our own TOML or JSON format, for `correct`.

A worksheet holds one session::

    convention = "trs398"            # or "tg51"
    beam = "pulsed"                  # pulsed | pulsed-scanned | continuous
    modality = "photon"              # or "electron" (photon when absent)
    R50_cm = 4.2                     # electron beams only: R50 in cm; z_ref = 0.6 R50 - 0.1 cm
    [session]      machine, beam_quality, chamber, electrometer, date, operator, notes (text);
                   chamber_type: cylindrical | plane-parallel (required for an electron beam).
                   An electron worksheet's beam_quality may not name a photon quality
                   (TPR20,10, %dd(10)x, "MV", "photons"): its quality is R50.
    [environment]  temperature_C, pressure_kPa | pressure_hPa | pressure_mmHg, humidity_pct
    [environment.routine], [environment.opposite], [environment.reduced], [environment.return]
                   (optional) the air while that set was taken: temperature_C and one pressure
                   key; the set's mean is corrected with it before k_pol and k_s are formed
                   and the return check is compared, and the routine set's gives k_TP. A set
                   without one uses [environment].
    [bias]         routine_V (signed), reduced_V (magnitude, or signed with the routine polarity)
    [readings]     routine_nC = [...], opposite_nC = [...], reduced_nC = [...], leakage_nC,
                   return_nC = [...] (the return to the routine setting at the end)
    [calibration]  N_Dw_Gy_per_nC | N_Dw_Gy_per_C | N_Dw_cGy_per_nC, k_Q, k_elec,
                   monitor_units (per reading, the same for every set: k_pol and k_s are ratios
                   of the sets' mean charges), expected_cGy_per_MU, tolerance_pct (number, or
                   "daily", "monthly", "annual"), u_N_Dw_pct_k2 (the certificate's expanded
                   uncertainty), k_N_Dw (its coverage factor, 2 unless stated), u_k_Q_pct,
                   k_Q_source (where k_Q comes from: the code of practice's table for this
                   chamber and beam quality, or the user's own determination; required for an
                   electron beam)
    [uncertainty]  u_temperature_C, u_pressure_kPa, u_k_elec_pct (give it with k_elec: without
                   it an entered k_elec is left out of u_c and flagged), coverage_probability
                   (0.95), and the user's components in %: u_reference_conditions_pct,
                   u_long_term_stability_pct, u_beam_monitor_pct, u_electrometer_resolution_pct
    [thresholds]   any field of chargebook.corrections.stability.Thresholds
    [carried]      k_pol = { value, source, date, u_pct }, k_s = { ... } (optional): a factor
                   carried from an earlier full calibration, for a routine output check with
                   no opposite-polarity or reduced-bias readings (value, source and date
                   required; u_pct its standard uncertainty in %, optional; u_source optional).
                   Checked against [session] date, else the day the worksheet is read: a
                   factor dated later is refused, one older than the threshold
                   carried_max_age_days is flagged. A factor both carried and measured is refused.

Reading is strict: an unknown key, a value of the wrong type, an empty reading set or two
spellings of one quantity is an InputError naming the key. Ranges are checked by ``evaluate``.
Pressure and N_D,w given in other units are converted once, and the conversion is kept in
``MeasurementInputs.conversions`` so the results can show it.
"""

from __future__ import annotations

import dataclasses
import datetime
import itertools
import json
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Any

from chargebook.corrections import units
from chargebook.corrections.beam_quality import BeamQuality, check_wording
from chargebook.corrections.carried import (
    CARRIED_KEYS,
    MEASURED_BY,
    CarriedFactor,
    carried_factor,
    parse_date,
)
from chargebook.corrections.errors import InputError
from chargebook.corrections.evaluate import AIR_KEYS, MeasurementInputs, Uncertainties
from chargebook.corrections.set_air import SetEnvironment
from chargebook.corrections.stability import Thresholds

NUMBER = "a number"
NUMBERS = "a list of numbers"
TEXT = "text"
NUMBER_OR_TEXT = "a number or a name"
CARRIED_TABLE = "a table with value, source, date and optionally u_pct, u_source"
INTEGER_OR_NONE = "an integer"

#: Section -> key -> the kind of value it takes. "" is the top level.
SCHEMA: Mapping[str, Mapping[str, str]] = MappingProxyType(
    {
        "": {"convention": TEXT, "beam": TEXT, "modality": TEXT, "R50_cm": NUMBER},
        "session": {
            key: TEXT
            for key in (
                "machine",
                "beam_quality",
                "chamber",
                "electrometer",
                "date",
                "operator",
                "notes",
                "chamber_type",
            )
        },
        "environment": {
            "temperature_C": NUMBER,
            "pressure_kPa": NUMBER,
            "pressure_hPa": NUMBER,
            "pressure_mmHg": NUMBER,
            "humidity_pct": NUMBER,
        },
        "bias": {"routine_V": NUMBER, "reduced_V": NUMBER},
        "readings": {
            "routine_nC": NUMBERS,
            "opposite_nC": NUMBERS,
            "reduced_nC": NUMBERS,
            "return_nC": NUMBERS,
            "leakage_nC": NUMBER,
        },
        "calibration": {
            "N_Dw_Gy_per_nC": NUMBER,
            "N_Dw_Gy_per_C": NUMBER,
            "N_Dw_cGy_per_nC": NUMBER,
            "k_Q": NUMBER,
            "k_elec": NUMBER,
            "monitor_units": NUMBER,
            "expected_cGy_per_MU": NUMBER,
            "tolerance_pct": NUMBER_OR_TEXT,
            "u_N_Dw_pct_k2": NUMBER,
            "k_N_Dw": NUMBER,
            "u_k_Q_pct": NUMBER,
            "k_Q_source": TEXT,
        },
        "uncertainty": {
            "u_temperature_C": NUMBER,
            "u_pressure_kPa": NUMBER,
            "u_k_elec_pct": NUMBER,
            "coverage_probability": NUMBER,
            "u_reference_conditions_pct": NUMBER,
            "u_long_term_stability_pct": NUMBER,
            "u_beam_monitor_pct": NUMBER,
            "u_electrometer_resolution_pct": NUMBER,
        },
        "thresholds": {
            item.name: (
                INTEGER_OR_NONE
                if item.name in ("minimum_readings", "charge_sign_for_positive_bias")
                else TEXT
                if item.name == "recombination_off_table"
                else NUMBER
            )
            for item in dataclasses.fields(Thresholds)
        },
        "carried": {key: CARRIED_TABLE for key in CARRIED_KEYS},
    }
)

#: The keys of a set's own environment table (``[environment.routine]`` ...).
SET_ENVIRONMENT_KEYS = ("temperature_C", "pressure_kPa", "pressure_hPa", "pressure_mmHg")

REQUIRED: tuple[tuple[str, str], ...] = (
    ("", "convention"),
    ("", "beam"),
    ("readings", "routine_nC"),
)


@dataclass(frozen=True)
class Worksheet:
    """A worksheet read from ``path``: the inputs for ``evaluate`` and the session's description."""

    path: Path
    inputs: MeasurementInputs
    session: Mapping[str, str]


def _name(section: str, key: str) -> str:
    return f"{section}.{key}" if section else key


def _is_number(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _refuse_split_numbers(name: str, charges_nC: list[Any]) -> None:
    """Refuse a charge list that mixes integers with decimals, the mark of a typed comma.

    ``[14.747, 14,749]`` is valid TOML and JSON (the integers 14 and 749), so the slip would
    otherwise pass as two readings and surface only as an odd ratio or a flag.
    """
    integers = [item for item in charges_nC if isinstance(item, int)]
    if not integers or len(integers) == len(charges_nC):
        return
    shown = " and ".join(str(item) for item in integers)
    hint = ""
    for first, second in itertools.pairwise(charges_nC):
        if isinstance(first, int) and isinstance(second, int):
            hint = f" Write {first}.{second}"
            break
    raise InputError(
        name,
        charges_nC,
        "charges in nC written with a decimal point",
        f"holds {shown} among decimal readings: a comma inside a number?{hint}",
    )


def _typed(section: str, key: str, value: object) -> Any:
    kind = SCHEMA[section][key]
    name = _name(section, key)
    if kind == NUMBER and _is_number(value):
        return float(value)
    if kind == INTEGER_OR_NONE and isinstance(value, int) and not isinstance(value, bool):
        return value
    if kind == TEXT and isinstance(value, str | datetime.date | datetime.time):
        return str(value)
    if kind == NUMBER_OR_TEXT and (_is_number(value) or isinstance(value, str)):
        return value
    if kind == NUMBERS and isinstance(value, list):
        if not value:
            raise InputError(name, [], "at least one reading in nC", "is an empty reading set")
        for index, item in enumerate(value):
            if not _is_number(item):
                raise InputError(f"{name}[{index}]", item, "a charge in nC", "is not a number")
        _refuse_split_numbers(name, value)
        return tuple(float(item) for item in value)
    raise InputError(name, value, kind, f"is of the wrong type ({type(value).__name__})")


def _sections(document: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """Return section -> {key: typed value}, refusing unknown sections and keys."""
    result: dict[str, dict[str, Any]] = {section: {} for section in SCHEMA}
    for key, value in document.items():
        if key in SCHEMA[""]:
            result[""][key] = _typed("", key, value)
            continue
        if key not in SCHEMA:
            known = ", ".join([*SCHEMA[""], *(f"[{s}]" for s in SCHEMA if s)])
            raise InputError(key, value, known, "is not a known key")
        if not isinstance(value, Mapping):
            raise InputError(key, value, f"a [{key}] table", "is not a table")
        for inner, inner_value in value.items():
            if key == "environment" and inner in AIR_KEYS:
                result[key][inner] = _set_environment_table(inner, inner_value)
                continue
            if inner not in SCHEMA[key]:
                known = ", ".join(SCHEMA[key])
                raise InputError(_name(key, inner), inner_value, known, "is not a known key")
            if key == "carried":
                result[key][inner] = inner_value  # checked whole by _carried
                continue
            result[key][inner] = _typed(key, inner, inner_value)
    for section, key in REQUIRED:
        if key not in result[section]:
            allowed = CHOICES.get(key, SCHEMA[section][key])
            raise InputError(_name(section, key), None, allowed, "is missing")
    return result


def _set_environment_table(set_key: str, value: object) -> dict[str, float]:
    """Return a set's own environment table, typed; InputError naming the key otherwise."""
    section = f"environment.{set_key}"
    if not isinstance(value, Mapping):
        raise InputError(section, value, f"a [{section}] table", "is not a table")
    table: dict[str, float] = {}
    for key, item in value.items():
        if key not in SET_ENVIRONMENT_KEYS:
            known = ", ".join(SET_ENVIRONMENT_KEYS)
            raise InputError(_name(section, key), item, known, "is not a known key")
        table[key] = _typed("environment", key, item)
    if "temperature_C" not in table:
        raise InputError(_name(section, "temperature_C"), None, NUMBER, "is missing")
    return table


def _set_environments(
    environment: Mapping[str, Any],
) -> tuple[dict[str, SetEnvironment], list[units.Conversion]]:
    """Return the per-set environments of the worksheet and the pressure conversions made."""
    found: dict[str, SetEnvironment] = {}
    conversions: list[units.Conversion] = []
    for set_key in AIR_KEYS:
        table = environment.get(set_key)
        if table is None:
            continue
        pressure, converted = _pressure(table, f"environment.{set_key}")
        if pressure is None:
            keys = ", ".join(SET_ENVIRONMENT_KEYS[1:])
            raise InputError(f"environment.{set_key}.pressure_kPa", None, keys, "is missing")
        found[set_key] = SetEnvironment(
            table["temperature_C"], pressure, f"worksheet [environment.{set_key}]"
        )
        conversions += converted
    return found, conversions


def _one_of(section: str, values: Mapping[str, Any], keys: tuple[str, ...]) -> str | None:
    given = [key for key in keys if key in values]
    if len(given) > 1:
        raise InputError(
            _name(section, given[1]),
            values[given[1]],
            f"only one of {', '.join(keys)}",
            f"is given together with {given[0]}",
        )
    return given[0] if given else None


def _pressure(
    environment: Mapping[str, Any], section: str = "environment"
) -> tuple[float | None, list[units.Conversion]]:
    key = _one_of(section, environment, ("pressure_kPa", "pressure_hPa", "pressure_mmHg"))
    if key is None:
        return None, []
    unit = key.removeprefix("pressure_")
    value = environment[key]
    kPa = float(units.pressure_kPa(value, unit))
    if unit == "kPa":
        return kPa, []
    return kPa, [units.Conversion("pressure", value, unit, kPa, "kPa")]


def _calibration_coefficient(
    calibration: Mapping[str, Any],
) -> tuple[float | None, list[units.Conversion]]:
    keys = ("N_Dw_Gy_per_nC", "N_Dw_Gy_per_C", "N_Dw_cGy_per_nC")
    key = _one_of("calibration", calibration, keys)
    if key is None:
        return None, []
    value = calibration[key]
    if key == "N_Dw_Gy_per_nC":
        return value, []  # range checked by evaluate under this name
    unit = key.removeprefix("N_Dw_").replace("_per_", "/")
    Gy_per_nC = float(units.N_Dw_Gy_per_nC(value, unit))
    return Gy_per_nC, [units.Conversion("N_D,w", value, unit, Gy_per_nC, "Gy/nC")]


def _measured_on(session: Mapping[str, Any], today: datetime.date | None) -> str:
    """Return the measurement's date: [session] date when given, else ``today`` (or the
    computer's date)."""
    if "date" in session:
        return parse_date("session.date", session["date"]).isoformat()
    return (today or datetime.date.today()).isoformat()


def _carried(tables: Mapping[str, Any], measured_on: str) -> dict[str, CarriedFactor]:
    """Return the [carried] factors, each checked by name (``carried.k_pol.date``)."""
    return {
        key: carried_factor(f"carried.{key}", table, measured_on) for key, table in tables.items()
    }


#: What a missing key of the worksheet's top level may be, said when it is missing.
CHOICES = {
    "convention": "trs398 or tg51",
    "beam": "pulsed, pulsed-scanned or continuous",
}


def parse_worksheet(
    document: Mapping[str, Any],
    path: Path | str = "<worksheet>",
    today: datetime.date | None = None,
) -> Worksheet:
    """Return the Worksheet held by a parsed TOML/JSON ``document``; raise InputError if invalid.

    ``today``: the date a worksheet without [session] date is taken to be measured on (None:
    the computer's date); carried factors are checked against it.
    """
    if not isinstance(document, Mapping):
        raise InputError("worksheet", document, "a table of keys", "is not a table")
    if not document:
        raise InputError(
            "worksheet",
            str(path),
            "convention, beam, [environment], [bias], [readings] and [calibration] (see "
            "acquire/examples/)",
            "is empty",
        )
    sections = _sections(document)
    top, session = sections[""], sections["session"]
    modality = top.get("modality", "photon")
    check_wording("session.beam_quality", session.get("beam_quality"), modality)
    measured_on = _measured_on(sections["session"], today) if sections["carried"] else None
    environment, calibration = sections["environment"], sections["calibration"]
    readings, uncertainty = sections["readings"], sections["uncertainty"]
    pressure, pressure_conversions = _pressure(environment)
    per_set, set_conversions = _set_environments(environment)
    N_Dw, N_Dw_conversions = _calibration_coefficient(calibration)
    uncertainties = Uncertainties(
        u_N_Dw_pct_k2=calibration.get("u_N_Dw_pct_k2"),
        u_k_Q_pct=calibration.get("u_k_Q_pct"),
        **({"k_N_Dw": calibration["k_N_Dw"]} if "k_N_Dw" in calibration else {}),
        **uncertainty,
    )
    inputs = MeasurementInputs(
        convention=sections[""]["convention"],
        beam=sections[""]["beam"],
        temperature_C=environment.get("temperature_C"),
        pressure_kPa=pressure,
        humidity_pct=environment.get("humidity_pct"),
        routine_bias_V=sections["bias"].get("routine_V"),
        reduced_bias_V=sections["bias"].get("reduced_V"),
        routine_nC=readings["routine_nC"],
        opposite_nC=readings.get("opposite_nC", ()),
        reduced_nC=readings.get("reduced_nC", ()),
        return_nC=readings.get("return_nC", ()),
        leakage_nC=readings.get("leakage_nC"),
        N_Dw_Gy_per_nC=N_Dw,
        k_Q=calibration.get("k_Q"),
        k_elec=calibration.get("k_elec"),
        monitor_units=calibration.get("monitor_units"),
        expected_cGy_per_MU=calibration.get("expected_cGy_per_MU"),
        tolerance_pct=calibration.get("tolerance_pct"),
        uncertainties=uncertainties,
        thresholds=Thresholds(**sections["thresholds"]),
        conversions=tuple(pressure_conversions + set_conversions + N_Dw_conversions),
        set_environments=per_set,
        carried=_carried(sections["carried"], measured_on) if measured_on else {},
        measured_on=measured_on,
        not_measured=tuple(
            key
            for key, set_key in MEASURED_BY.items()
            if not readings.get(f"{set_key}_nC") and key not in sections["carried"]
        ),
        quality=BeamQuality(
            modality, top.get("R50_cm"), session.get("chamber_type"), calibration.get("k_Q_source")
        ),
    )
    return Worksheet(Path(path), inputs, MappingProxyType(dict(sections["session"])))


def _read_document(path: Path) -> Any:
    suffix = path.suffix.lower()
    if suffix not in (".toml", ".json"):
        raise InputError("worksheet", str(path), "a .toml or .json file", "has an unknown type")
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as error:
        reason = getattr(error, "strerror", None) or str(error)
        raise InputError(
            "worksheet", str(path), "a readable file", f"cannot be read: {reason}"
        ) from None
    try:
        return tomllib.loads(text) if suffix == ".toml" else json.loads(text)
    except (tomllib.TOMLDecodeError, json.JSONDecodeError) as error:
        kind = "TOML" if suffix == ".toml" else "JSON"
        raise InputError(
            "worksheet", str(path), f"valid {kind}", f"is not valid {kind}: {error}"
        ) from None


#: MeasurementInputs field -> the worksheet key that fills it, where the names differ.
_RENAMED = {
    "routine_bias_V": "bias.routine_V",
    "reduced_bias_V": "bias.reduced_V",
    "uncertainties.u_N_Dw_pct_k2": "calibration.u_N_Dw_pct_k2",
    "uncertainties.u_k_Q_pct": "calibration.u_k_Q_pct",
    "uncertainties.k_N_Dw": "calibration.k_N_Dw",
}


def worksheet_key(field: str) -> str | None:
    """Return the worksheet key (``section.key``) behind an evaluate() error field, if any.

    ``evaluate`` names fields as ``MeasurementInputs`` spells them (``reduced_bias_V``,
    ``routine_nC[2]``, ``voltage ratio routine_bias_V/reduced_bias_V``); this finds the key the
    operator typed, so the message can point at the line to fix.
    """
    if field.startswith("carried."):
        return field
    if field.startswith("set_environments."):
        return "environment." + field.removeprefix("set_environments.")
    for name, key in _RENAMED.items():
        if name in field:
            return key
    base = field.strip("|").split("[", 1)[0].removeprefix("uncertainties.")
    for section, keys in SCHEMA.items():
        if section and base in keys:
            return _name(section, base)
    return None


def read_worksheet(path: Path | str) -> Worksheet:
    """Return the Worksheet in the TOML or JSON file at ``path``; raise InputError if invalid."""
    path = Path(path)
    return parse_worksheet(_read_document(path), path)


def load_worksheet(path: Path | str) -> MeasurementInputs:
    """Return the MeasurementInputs of the worksheet at ``path``; raise InputError if invalid."""
    return read_worksheet(path).inputs
