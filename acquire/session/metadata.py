"""Session metadata: what was measured, with what, by whom, and against which calibration.

``validate_metadata(data)`` checks a plain dict (from the console's form, a JSON-RPC request, or
a session row read back) and returns a :class:`SessionMetadata`; ``to_dict()`` gives the plain
data the store keeps, which validates again to the same value. Anything wrong raises
``InputError`` naming the field, the value and what is allowed.

Keys (required unless a default is shown)::

    treatment_machine     "DEMO-LA1"                   the treatment machine
    beam                  "6 MV"                      the beam, as the clinic names it
    beam_type             pulsed | pulsed-scanned | continuous   (recombination method)
    convention            trs398 | tg51               the code of practice followed
    chamber_model         "thimble 0.6 cc"
    chamber_serial        "SIM-CH-0001"
    electrometer_model    "..."
    electrometer_serial   "SIM-EM-0001"
    operator              the person taking the measurement
    N_Dw                  calibration coefficient, in N_Dw_unit
    N_Dw_unit             Gy/nC (default) | Gy/C | cGy/nC; converted once to N_Dw_Gy_per_nC
    k_Q                   beam quality correction factor, from the user's code of practice
    expected_cGy_per_MU   the expected output
    u_N_Dw_pct_k2         None    N_D,w expanded uncertainty from the certificate (k = 2), %
    u_k_Q_pct             None    k_Q standard uncertainty, %
    k_elec                None    electrometer factor; None: 1, calibrated together (flagged)
    u_k_elec_pct          None    k_elec standard uncertainty, % (None with an entered k_elec:
                                  left out of u_c and flagged, never counted as exact)
    u_temperature_C       None    thermometer standard uncertainty, °C (None: library default)
    u_pressure_kPa        None    barometer standard uncertainty, kPa (None: library default)
    k_N_Dw                None    the certificate's coverage factor for u_N_Dw_pct_k2 (None: 2)
    coverage_probability  None    of the expanded uncertainty (None: 0.95)
    u_reference_conditions_pct, u_long_term_stability_pct, u_beam_monitor_pct,
    u_electrometer_resolution_pct
                          None    the user's own budget components, relative standard
                                  uncertainties in % (None: not in the budget)
    tolerance_pct         None    a number in %, or daily | monthly | annual (AAPM TG-142);
                                  None: the library's default (TG-142 monthly, 2 %)
    calibration_date      None    date of the calibration certificate, YYYY-MM-DD
    certificate           None    certificate number or laboratory
    beam_quality          None    beam quality specifier as measured, e.g. "TPR20,10 = 0.668"
    notes                 None    free text
    modality              photon  photon | electron
    R50_cm                None    electron beams: R50, the depth of the 50 % dose in water, cm
                                  (1 to 20); z_ref = 0.6 R50 − 0.1 cm is computed. Required for
                                  an electron beam, refused for a photon beam
    chamber_type          None    cylindrical | plane-parallel (required for an electron beam;
                                  a cylindrical chamber below the protocol's R50 is flagged)
    registers             None    the register rows the session uses: {beam, chamber,
                                  electrometer, certificate?, k_Q?, thermometer?, barometer?}
                                  -> row id; the daemon fills the fields they hold, and keeps
                                  register_copy (the rows as they were) and register_warnings
                                  (an expired certificate, no k_Q ... in words)
    k_Q_source            None    where k_Q comes from (the code of practice's table for this
                                  chamber and beam quality, or the user's own determination);
                                  required for an electron beam
    subtract_leakage      false   subtract the measured leakage from the routine reading (the
                                  operator's choice, recorded in the audit); false: the leakage
                                  is only reported as a percentage of the routine reading
    carried_k_pol         None    k_pol carried into a session whose plan takes no
    carried_k_s           None    opposite-polarity (k_pol) or reduced-bias (k_s) readings: an
                                  object {value, source, date (YYYY-MM-DD), u_pct?, u_source?,
                                  chamber_serial?, electrometer_serial?, from_session?,
                                  session_date?}. Refused when its chamber or electrometer
                                  serial differs from the session's, or its date is after
                                  session_date (the day the session started, which the daemon
                                  fills in; absent: today). The daemon fills both in from the
                                  beam's last full calibration when they are not given.

An electron session's beam and beam_quality may not name a photon quality (TPR20,10, %dd(10)x,
"MV", "photons"), and its beam_type is pulsed or pulsed-scanned.

Monitor units per reading come from the plan, not from here.
"""

from __future__ import annotations

import datetime
import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from typing import Any

from chargebook.acquire.session.action_level import ACTION_LEVEL_KEY as ACTION_LEVEL_KEY
from chargebook.acquire.session.action_level import action_level_pct as action_level_pct
from chargebook.corrections import dose, limits, units
from chargebook.corrections.beam_quality import BeamQuality, check_quality, check_wording
from chargebook.corrections.carried import (
    CarriedFactor,
    carried_factor,
    checked_text,
    parse_date,
)
from chargebook.corrections.conventions import parse_convention
from chargebook.corrections.errors import InputError
from chargebook.corrections.evaluate import USER_COMPONENTS, Uncertainties
from chargebook.corrections.recombination import Beam, parse_beam
from chargebook.corrections.units import Conversion

TEXT_FIELDS = (
    "treatment_machine",
    "beam",
    "chamber_model",
    "chamber_serial",
    "electrometer_model",
    "electrometer_serial",
    "operator",
)
OPTIONAL_TEXT_FIELDS = ("certificate", "beam_quality", "notes")
MAX_TEXT = 200
MAX_NOTES = 4000
#: Relative difference tolerated between a stored N_Dw_Gy_per_nC and N_Dw converted again.
CONVERSION_MATCH = 1e-12


@dataclass(frozen=True, slots=True)
class SessionMetadata:
    """Checked session metadata. N_D,w is kept as entered and converted to Gy/nC once."""

    treatment_machine: str
    beam: str
    beam_type: str
    convention: str
    chamber_model: str
    chamber_serial: str
    electrometer_model: str
    electrometer_serial: str
    operator: str
    N_Dw: float
    N_Dw_unit: str
    N_Dw_Gy_per_nC: float
    k_Q: float
    expected_cGy_per_MU: float
    u_N_Dw_pct_k2: float | None = None
    u_k_Q_pct: float | None = None
    k_elec: float | None = None
    u_k_elec_pct: float | None = None
    u_temperature_C: float | None = None
    u_pressure_kPa: float | None = None
    k_N_Dw: float | None = None
    coverage_probability: float | None = None
    u_reference_conditions_pct: float | None = None
    u_long_term_stability_pct: float | None = None
    u_beam_monitor_pct: float | None = None
    u_electrometer_resolution_pct: float | None = None
    tolerance_pct: float | None = None
    calibration_date: str | None = None
    certificate: str | None = None
    beam_quality: str | None = None
    notes: str | None = None
    subtract_leakage: bool = False
    carried_k_pol: dict[str, Any] | None = None
    carried_k_s: dict[str, Any] | None = None
    modality: str = "photon"
    R50_cm: float | None = None
    chamber_type: str | None = None
    k_Q_source: str | None = None
    registers: dict[str, int] | None = None
    register_copy: dict[str, Any] | None = None
    register_warnings: list[str] | None = None

    def quality(self) -> BeamQuality:
        """Return the beam quality for ``evaluate``: modality, R50 (cm), chamber type, k_Q's
        source."""
        return BeamQuality(self.modality, self.R50_cm, self.chamber_type, self.k_Q_source)

    def carried(self) -> dict[str, CarriedFactor]:
        """Return the carried factors for ``evaluate`` (key -> CarriedFactor)."""
        found = {"k_pol": self.carried_k_pol, "k_s": self.carried_k_s}
        return {
            key: CarriedFactor(**{name: table[name] for name in CARRIED_FACTOR_FIELDS})
            for key, table in found.items()
            if table is not None
        }

    def measured_on(self) -> str | None:
        """Return the day the session started as its carried factors record it, or None."""
        tables = [t for t in (self.carried_k_pol, self.carried_k_s) if t is not None]
        return tables[0]["session_date"] if tables else None

    def to_dict(self) -> dict[str, Any]:
        """Return the metadata as plain data, every key present (None where not given)."""
        return asdict(self)

    def uncertainties(self) -> Uncertainties:
        """Return the Type B inputs for ``evaluate``; unset ones keep the library's defaults."""
        given = {
            "u_N_Dw_pct_k2": self.u_N_Dw_pct_k2,
            "u_k_Q_pct": self.u_k_Q_pct,
            "u_k_elec_pct": self.u_k_elec_pct,
            "u_temperature_C": self.u_temperature_C,
            "u_pressure_kPa": self.u_pressure_kPa,
            "k_N_Dw": self.k_N_Dw,
            "coverage_probability": self.coverage_probability,
            **{name: getattr(self, name) for name in USER_COMPONENTS},
        }
        return Uncertainties(**{k: v for k, v in given.items() if v is not None})

    def conversions(self) -> tuple[Conversion, ...]:
        """Return the unit conversion made on N_D,w, if it was entered in another unit."""
        if self.N_Dw_unit == "Gy/nC":
            return ()
        return (Conversion("N_D,w", self.N_Dw, self.N_Dw_unit, self.N_Dw_Gy_per_nC, "Gy/nC"),)


def _text(data: Mapping[str, Any], name: str, *, required: bool, longest: int) -> str | None:
    value = data.get(name)
    if value is None and not required:
        return None
    if value is None:
        raise InputError(name, None, f"a text of 1 to {longest} characters", "is missing")
    return checked_text(name, value, longest)


def _number(data: Mapping[str, Any], name: str, check: limits.Range, *, required: bool) -> Any:
    value = data.get(name)
    if value is None:
        if required:
            raise InputError(name, None, check.text(), "is missing")
        return None
    return float(check.check(name, value))


def _date(data: Mapping[str, Any], name: str) -> str | None:
    value = data.get(name)
    if value is None:
        return None
    allowed = "a date written YYYY-MM-DD"
    if isinstance(value, datetime.date) and not isinstance(value, datetime.datetime):
        return value.isoformat()
    if not isinstance(value, str):
        raise InputError(name, value, allowed, "is not a date")
    try:
        return datetime.date.fromisoformat(value.strip()).isoformat()
    except ValueError:
        raise InputError(name, value, allowed, "is not a date") from None


def _calibration(data: Mapping[str, Any]) -> tuple[float, str, float]:
    """Return (N_Dw as entered, its unit, N_Dw in Gy/nC), cross-checking a stored conversion."""
    stored = data.get("N_Dw_Gy_per_nC")
    if data.get("N_Dw") is None:
        if stored is None:
            raise InputError("N_Dw", None, "the calibration coefficient N_D,w", "is missing")
        value = float(units.N_Dw_Gy_per_nC(stored, "Gy/nC"))
        return value, "Gy/nC", value
    unit = data.get("N_Dw_unit", "Gy/nC")
    if unit is None:
        unit = "Gy/nC"
    if not isinstance(unit, str):
        raise InputError("N_Dw_unit", unit, ", ".join(units.N_DW_UNITS), "is not a known unit")
    try:
        converted = float(units.N_Dw_Gy_per_nC(data["N_Dw"], unit))
    except InputError as error:
        field = "N_Dw_unit" if error.value == unit and "unit" in error.field else "N_Dw"
        raise InputError(field, error.value, error.allowed, error.problem) from None
    if stored is not None:
        stored_value = limits.as_number("N_Dw_Gy_per_nC", stored, f"{converted:.6g} Gy/nC")
        if not math.isclose(stored_value, converted, rel_tol=CONVERSION_MATCH):
            raise InputError(
                "N_Dw_Gy_per_nC",
                stored,
                f"{converted:.6g} Gy/nC, N_Dw converted",
                f"contradicts N_Dw = {data['N_Dw']} {unit}",
            )
    return float(data["N_Dw"]), unit, converted


def _flag(data: Mapping[str, Any], name: str) -> bool:
    """Return a yes/no setting (absent or None: False); InputError unless true or false."""
    value = data.get(name)
    if value is None:
        return False
    if not isinstance(value, bool):
        raise InputError(name, value, "true or false", "is not a yes/no value")
    return value


def _tolerance(data: Mapping[str, Any]) -> float | None:
    value = data.get("tolerance_pct")
    return None if value is None else float(dose.tolerance_pct(value))


KNOWN_KEYS = tuple(f.name for f in fields(SessionMetadata))
CARRIED_FACTOR_FIELDS = tuple(f.name for f in fields(CarriedFactor))
#: Where a carried factor was measured, beside its value: checked against the session.
CARRIED_SERIALS = ("chamber_serial", "electrometer_serial")
CARRIED_PROVENANCE = (*CARRIED_SERIALS, "from_session", "session_date")


def _carried(data: Mapping[str, Any], name: str, texts: Mapping[str, Any]) -> dict | None:
    """Return a checked carried factor object (plain data), or None when not given.

    Its serials, when given, must be the session's: a factor measured with another chamber or
    electrometer does not hold for this one.
    """
    table = data.get(name)
    if table is None:
        return None
    if not isinstance(table, Mapping):
        raise InputError(name, table, "an object with value, source and date", "is not a table")
    core = {key: value for key, value in table.items() if key not in CARRIED_PROVENANCE}
    today = datetime.datetime.now(datetime.UTC).date().isoformat()
    session_date = table.get("session_date")
    if session_date is not None:
        session_date = parse_date(f"{name}.session_date", session_date).isoformat()
    factor = carried_factor(name, core, session_date or today)
    provenance: dict[str, Any] = {"session_date": session_date}
    for serial in CARRIED_SERIALS:
        value = _text(table, serial, required=False, longest=MAX_TEXT)
        if value is not None and value != texts[serial]:
            raise InputError(
                f"{name}.{serial}",
                value,
                f"the session's {serial} {texts[serial]!r}",
                f"is from another {serial.removesuffix('_serial')}",
            )
        provenance[serial] = value if value is not None else texts[serial]
    origin = table.get("from_session")
    if origin is not None and (isinstance(origin, bool) or not isinstance(origin, int)):
        raise InputError(f"{name}.from_session", origin, "a session id", "is not a session id")
    return {**factor.to_dict(), **provenance, "from_session": origin}


def validate_metadata(data: Mapping[str, Any]) -> SessionMetadata:
    """Return checked metadata from a plain mapping; raise InputError naming the bad field.

    Unknown keys are refused (a typo would otherwise drop a value silently). Ranges are the
    physics library's plausibility limits (k_Q 0.8–1.2, k_elec 0.9–1.1, N_D,w in Gy/nC 1e-4–100,
    expected output 0.01–10 cGy/MU, tolerance 0.01–20 %, uncertainties 0–50 %).
    """
    if not isinstance(data, Mapping):
        raise InputError("metadata", data, "a table of the session's details", "is not a table")
    for key in data:
        if key not in KNOWN_KEYS:
            raise InputError(str(key), data[key], "one of " + ", ".join(KNOWN_KEYS), "is not known")
    texts = {name: _text(data, name, required=True, longest=MAX_TEXT) for name in TEXT_FIELDS}
    optional_texts = {
        name: _text(data, name, required=False, longest=MAX_NOTES if name == "notes" else MAX_TEXT)
        for name in OPTIONAL_TEXT_FIELDS
    }
    if data.get("beam_type") is None:
        raise InputError("beam_type", None, "pulsed, pulsed-scanned or continuous", "is missing")
    if data.get("convention") is None:
        raise InputError("convention", None, "trs398 or tg51", "is missing")
    N_Dw, N_Dw_unit, N_Dw_Gy_per_nC = _calibration(data)
    beam_type = parse_beam(data["beam_type"])
    quality = _quality(data, beam_type)
    check_wording("beam", texts["beam"], quality.modality)
    check_wording("beam_quality", optional_texts["beam_quality"], quality.modality)
    u_k_elec = _number(data, "u_k_elec_pct", limits.UNCERTAINTY_PCT, required=False)
    return SessionMetadata(
        **texts,
        beam_type=beam_type.value,
        convention=parse_convention(data["convention"]).value,
        N_Dw=N_Dw,
        N_Dw_unit=N_Dw_unit,
        N_Dw_Gy_per_nC=N_Dw_Gy_per_nC,
        k_Q=_number(data, "k_Q", limits.K_Q, required=True),
        expected_cGy_per_MU=_number(
            data, "expected_cGy_per_MU", limits.EXPECTED_CGY_PER_MU, required=True
        ),
        u_N_Dw_pct_k2=_number(data, "u_N_Dw_pct_k2", limits.UNCERTAINTY_PCT, required=False),
        u_k_Q_pct=_number(data, "u_k_Q_pct", limits.UNCERTAINTY_PCT, required=False),
        k_elec=_number(data, "k_elec", limits.K_ELEC, required=False),
        u_k_elec_pct=u_k_elec,
        u_temperature_C=_number(data, "u_temperature_C", limits.U_TEMPERATURE_C, required=False),
        u_pressure_kPa=_number(data, "u_pressure_kPa", limits.U_PRESSURE_KPA, required=False),
        k_N_Dw=_number(data, "k_N_Dw", limits.CERTIFICATE_K, required=False),
        coverage_probability=_number(
            data, "coverage_probability", limits.COVERAGE_PROBABILITY, required=False
        ),
        **{
            name: _number(data, name, limits.UNCERTAINTY_PCT, required=False)
            for name in USER_COMPONENTS
        },
        tolerance_pct=_tolerance(data),
        calibration_date=_date(data, "calibration_date"),
        subtract_leakage=_flag(data, "subtract_leakage"),
        carried_k_pol=_carried(data, "carried_k_pol", texts),
        carried_k_s=_carried(data, "carried_k_s", texts),
        **optional_texts,
        modality=quality.modality,
        R50_cm=quality.R50_cm,
        chamber_type=quality.chamber_type,
        k_Q_source=quality.k_Q_source,
        **_register_link(data),
    )


def _register_link(data: Mapping[str, Any]) -> dict[str, Any]:
    """Return the register rows a session names (kind -> row id), their copy and warnings, as
    stored (filled in by ``register_rows.fill_from_registers`` at session start)."""
    ids = data.get("registers")
    if ids is None:
        return {}
    if not isinstance(ids, Mapping) or not all(
        isinstance(v, int) and not isinstance(v, bool) for v in ids.values()
    ):
        raise InputError("registers", ids, "an object: kind -> register row id", "is not one")
    copy = data.get("register_copy")
    warnings = data.get("register_warnings")
    if copy is not None and not isinstance(copy, Mapping):
        raise InputError("register_copy", copy, "an object: kind -> row", "is not one")
    if warnings is not None and not (
        isinstance(warnings, list) and all(isinstance(w, str) for w in warnings)
    ):
        raise InputError("register_warnings", warnings, "a list of texts", "is not one")
    return {
        "registers": dict(ids),
        "register_copy": None if copy is None else dict(copy),
        "register_warnings": None if warnings is None else list(warnings),
    }


def _quality(data: Mapping[str, Any], beam_type: Beam) -> BeamQuality:
    """Return the checked modality, R50, chamber type and k_Q's source (photon when absent)."""
    modality = data.get("modality")
    given = BeamQuality(
        "photon" if modality is None else modality,
        data.get("R50_cm"),
        data.get("chamber_type"),
        data.get("k_Q_source"),
    )
    return check_quality(given, beam_type)
