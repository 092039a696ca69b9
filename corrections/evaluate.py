"""evaluate(): everything known about a session in, every result and flag out.

This is the one function the daemon's live results, the offline worksheet command, replay and
exports call, so every number an operator sees is computed here, once. Partial inputs are normal
(the daemon calls it after every reading): a factor whose inputs are missing is *pending*, and
every value depending on it is None, never computed as if the factor were 1. Invalid inputs
raise :class:`~chargebook.corrections.errors.InputError` naming the field, value and range.

Factor states, one rule for every factor (where its value comes from), are defined once in
:mod:`chargebook.corrections.factor_state`: measured, entered, default, pending. k_h is always
1 here and its state "default": with 20–80 % RH entered the protocols' rule gives 1 (the source
says the entered humidity is in the band), with none entered 1 is assumed (flag
``k_h_assumed``), outside the band 1 is still used (warning ``humidity_out_of_band``). k_elec = 1
when none is entered ("default"), as for a chamber and electrometer calibrated together.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np
from chargebook.corrections import dose as dose_module
from chargebook.corrections import humidity, limits, stability
from chargebook.corrections.air_density import k_TP as k_TP_of
from chargebook.corrections.air_density import k_TP_relative_sensitivity
from chargebook.corrections.conventions import Convention, constants, parse_convention
from chargebook.corrections.errors import Flag, InputError
from chargebook.corrections.factor_state import FactorState
from chargebook.corrections.polarity import k_pol as k_pol_of
from chargebook.corrections.recombination import (
    Beam,
    k_s_boag,
    parse_beam,
    tabulated_coefficients,
    voltage_ratio,
)
from chargebook.corrections.recombination import k_s as k_s_of
from chargebook.corrections.recombination import method as recombination_method
from chargebook.corrections.set_air import (
    SESSION_WIDE,
    SetEnvironment,
    air_scale,
    check_set_environments,
    environment_of,
    set_k_TP,
)
from chargebook.corrections.signs import set_signs
from chargebook.corrections.stability import Thresholds
from chargebook.corrections.statistics import SetStatistics, readings_array, set_statistics
from chargebook.corrections.uncertainty import (
    COVERAGE_FACTOR,
    Component,
    Estimate,
    ModelInputs,
    RelativeInput,
    budget,
    combine_pct,
    k_s_log_slope,
)
from chargebook.corrections.units import Conversion

#: Factor keys in the order of the measurement model.
FACTOR_KEYS: tuple[str, ...] = ("k_TP", "k_h", "k_pol", "k_s", "k_elec", "N_Dw", "k_Q")
#: Keys of the factors that make up the corrected charge (the rest turn it into dose).
CHARGE_FACTOR_KEYS: tuple[str, ...] = ("k_TP", "k_h", "k_pol", "k_s", "k_elec")
SET_KEYS: tuple[str, ...] = ("routine", "opposite", "reduced")
#: Budget source of a Type B input whose uncertainty was not given (flagged, never taken as 0).
NOT_GIVEN = "not given: left out of u_c"


@dataclass(frozen=True)
class Uncertainties:
    """Type B inputs, with documented defaults.

    ``u_N_Dw_pct_k2``: N_D,w's expanded uncertainty as on the calibration certificate (k = 2),
    halved here; None: not given, left out of u_c and flagged. ``u_k_Q_pct``: k_Q's standard
    uncertainty (%); None: likewise. ``u_k_elec_pct``: k_elec's standard uncertainty (%); None
    with no k_elec entered means 0 (chamber and electrometer calibrated together: N_D,w's
    uncertainty covers both), None with a k_elec entered means not given: left out of u_c and
    flagged, never taken as 0. ``u_temperature_C``: thermometer, 0.1 °C
    (a calibrated probe; common practice). ``u_pressure_kPa``: barometer, 0.05 kPa (a calibrated
    digital barometer; common practice).
    """

    u_N_Dw_pct_k2: float | None = None
    u_k_Q_pct: float | None = None
    u_k_elec_pct: float | None = None
    u_temperature_C: float = 0.1
    u_pressure_kPa: float = 0.05


@dataclass(frozen=True)
class MeasurementInputs:
    """Everything known about one session; None or an empty set means "not known yet".

    Charges in nC signed as read; biases in V (routine signed, reduced signed or a magnitude of
    the routine polarity); temperature in °C, pressure in kPa, humidity in % RH; N_D,w in Gy/nC;
    ``leakage_nC`` the leakage charge collected over one reading's duration. ``tolerance_pct``
    is a percentage or a name ("daily" 3 %, "monthly" 2 %, "annual" 1 %; AAPM TG-142); None
    uses the monthly 2 %.
    ``temperature_history_C`` and ``pressure_history_kPa`` are the values recorded during the
    session, to flag a changing environment. ``conversions`` records unit conversions made
    while reading the inputs, so they can be shown with the results.
    ``set_environments`` gives, per set ("routine", "opposite", "reduced"), the air in which
    that set was taken; a set without one uses ``temperature_C`` and ``pressure_kPa``. Each
    set's mean is referred to reference air with its own k_TP before k_pol and k_s are formed
    (:mod:`chargebook.corrections.set_air`); the routine set's k_TP is the result's.
    ``subtract_leakage``: subtract ``leakage_nC`` from the routine mean (the operator's choice;
    off by default, the leakage is then only reported as a percentage of the routine reading).
    """

    convention: str = "trs398"
    beam: str = "pulsed"
    temperature_C: float | None = None
    pressure_kPa: float | None = None
    humidity_pct: float | None = None
    routine_bias_V: float | None = None
    reduced_bias_V: float | None = None
    routine_nC: Sequence[float] = ()
    opposite_nC: Sequence[float] = ()
    reduced_nC: Sequence[float] = ()
    leakage_nC: float | None = None
    N_Dw_Gy_per_nC: float | None = None
    k_Q: float | None = None
    k_elec: float | None = None
    monitor_units: float | None = None
    expected_cGy_per_MU: float | None = None
    tolerance_pct: float | str | None = None
    uncertainties: Uncertainties = Uncertainties()
    thresholds: Thresholds = field(default_factory=Thresholds)
    temperature_history_C: Sequence[float] = ()
    pressure_history_kPa: Sequence[float] = ()
    conversions: tuple[Conversion, ...] = ()
    set_environments: Mapping[str, SetEnvironment] = field(default_factory=dict)
    subtract_leakage: bool = False


@dataclass(frozen=True)
class Factor:
    """One factor of the model: its printed symbol, value, state, relative u (%) and source."""

    symbol: str
    value: float | None
    state: str
    u_rel_pct: float | None = None
    source: str = ""


@dataclass(frozen=True)
class Evaluation:
    """Every result of one evaluation; values depending on a pending factor are None."""

    convention: Convention
    beam: Beam
    factors: Mapping[str, Factor]
    sets: Mapping[str, SetStatistics | None]
    M_raw_nC: float | None
    M_corrected_nC: float | None
    dose_Gy: float | None
    dose_per_MU_cGy: float | None
    expected_cGy_per_MU: float | None
    deviation_pct: float | None
    tolerance_pct: float
    tolerance_source: str
    within_tolerance: bool | None
    u_M_corrected_pct: float | None
    u_combined_pct: float | None
    U_expanded_pct: float | None
    budget: tuple[Component, ...]
    flags: tuple[Flag, ...]
    voltage_ratio: float | None = None
    charge_ratio: float | None = None
    recombination_method: str = ""
    conversions: tuple[Conversion, ...] = field(default_factory=tuple)
    #: The propagation model behind ``budget`` (None before the first routine reading), for
    #: a Monte Carlo cross-check with :func:`~chargebook.corrections.uncertainty.monte_carlo_u_pct`.
    uncertainty_model: ModelInputs | None = None
    #: Per set taken: the air it was taken in and its k_TP (see ``set_air``).
    set_air: Mapping[str, SetAir] = field(default_factory=dict)
    #: Leakage over one routine reading (nC, signed), as a percentage of the routine mean, and
    #: whether it was subtracted from the routine mean (the operator's choice).
    leakage_nC: float | None = None
    leakage_pct: float | None = None
    leakage_subtracted: bool = False
    #: Boag's theory for a pulsed beam at the measured M1/M2 and n, beside the protocol's k_s,
    #: and the protocol's k_s relative to it (%); None for continuous beams or no k_s.
    k_s_boag: float | None = None
    k_s_boag_difference_pct: float | None = None

    @property
    def symbols(self) -> Mapping[str, str]:
        """Return result key -> printed symbol under this evaluation's convention."""
        return constants(self.convention).symbols

    def to_dict(self) -> dict[str, object]:
        """Return the results as JSON-ready plain types (the keys documented in the README)."""
        reference = constants(self.convention)
        result: dict[str, object] = {
            "convention": self.convention.value,
            "beam": self.beam.value,
            "symbols": dict(reference.symbols),
            "reference_temperature_C": reference.reference_temperature_C,
            "reference_pressure_kPa": reference.reference_pressure_kPa,
        }
        for key in CHARGE_FACTOR_KEYS:
            result[key] = self.factors[key].value
        result["N_Dw_Gy_per_nC"] = self.factors["N_Dw"].value
        result["k_Q"] = self.factors["k_Q"].value
        result["factor_states"] = {key: str(f.state) for key, f in self.factors.items()}
        result["factor_sources"] = {key: f.source for key, f in self.factors.items()}
        result["factor_u_rel_pct"] = {key: f.u_rel_pct for key, f in self.factors.items()}
        result.update(
            {
                "voltage_ratio": self.voltage_ratio,
                "charge_ratio": self.charge_ratio,
                "recombination_method": self.recombination_method,
                "M_raw_nC": self.M_raw_nC,
                "M_corrected_nC": self.M_corrected_nC,
                "dose_Gy": self.dose_Gy,
                "dose_per_MU_cGy": self.dose_per_MU_cGy,
                "expected_cGy_per_MU": self.expected_cGy_per_MU,
                "deviation_pct": self.deviation_pct,
                "tolerance_pct": self.tolerance_pct,
                "tolerance_source": self.tolerance_source,
                "within_tolerance": self.within_tolerance,
                "u_M_corrected_pct": self.u_M_corrected_pct,
                "u_combined_pct": self.u_combined_pct,
                "U_expanded_pct": self.U_expanded_pct,
                "budget": [c.to_dict() for c in self.budget],
                "flags": [f.to_dict() for f in self.flags],
                "sets": {k: (s.to_dict() if s else None) for k, s in self.sets.items()},
                "conversions": [c.to_dict() for c in self.conversions],
                "set_air": {key: air.to_dict() for key, air in self.set_air.items()},
                "leakage_nC": self.leakage_nC,
                "leakage_pct": self.leakage_pct,
                "leakage_subtracted": self.leakage_subtracted,
                "k_s_boag": self.k_s_boag,
                "k_s_boag_difference_pct": self.k_s_boag_difference_pct,
            }
        )
        return result


@dataclass(frozen=True)
class SetAir:
    """The air one set was taken in (°C, kPa, where from) and the k_TP of that air."""

    temperature_C: float
    pressure_kPa: float
    source: str
    entry: int | None
    k_TP: float

    def to_dict(self) -> dict[str, object]:
        """Return the plain values (keys temperature_C, pressure_kPa, source, entry, k_TP)."""
        return dataclasses.asdict(self)


# ---------------------------------------------------------------- checking the inputs


def _optional(value: object, check: limits.Range, name: str) -> float | None:
    return None if value is None else float(check.check(name, value))


@dataclass(frozen=True)
class _Checked:
    """The scalar inputs after validation (None where not given)."""

    temperature_C: float | None
    pressure_kPa: float | None
    humidity_pct: float | None
    routine_bias_V: float | None
    voltage_ratio: float | None
    leakage_nC: float | None
    N_Dw_Gy_per_nC: float | None
    k_Q: float | None
    k_elec: float | None
    monitor_units: float | None
    expected_cGy_per_MU: float | None
    tolerance_pct: float
    set_environments: Mapping[str, SetEnvironment]


def _check_bias(inputs: MeasurementInputs) -> tuple[float | None, float | None]:
    allowed = f"±{limits.BIAS_MAGNITUDE_V.text()}"
    biases = []
    for name in ("routine_bias_V", "reduced_bias_V"):
        value = getattr(inputs, name)
        if value is not None:
            value = float(limits.as_number(name, value, allowed))
            limits.BIAS_MAGNITUDE_V.check(f"|{name}|", abs(value))
        biases.append(value)
    routine, reduced = biases
    if routine is None or reduced is None:
        return routine, None
    n = voltage_ratio(routine, reduced, fields=("routine_bias_V", "reduced_bias_V"))
    return routine, float(n)


def _check_uncertainties(u: Uncertainties) -> None:
    for name in ("u_N_Dw_pct_k2", "u_k_Q_pct", "u_k_elec_pct"):
        _optional(getattr(u, name), limits.UNCERTAINTY_PCT, f"uncertainties.{name}")
    limits.U_TEMPERATURE_C.check("uncertainties.u_temperature_C", u.u_temperature_C)
    limits.U_PRESSURE_KPA.check("uncertainties.u_pressure_kPa", u.u_pressure_kPa)


def _check_scalars(inputs: MeasurementInputs, convention: Convention, beam: Beam) -> _Checked:
    routine_V, n = _check_bias(inputs)
    if n is not None and convention is Convention.TRS398 and beam is not Beam.CONTINUOUS:
        # Refuse a ratio with no tabulated row now, before any reduced-bias reading is taken.
        tabulated_coefficients(n, beam, "voltage ratio routine_bias_V/reduced_bias_V")
    _check_uncertainties(inputs.uncertainties)
    for index, value in enumerate(inputs.temperature_history_C):
        limits.TEMPERATURE_C.check(f"temperature_history_C[{index}]", value)
    for index, value in enumerate(inputs.pressure_history_kPa):
        limits.PRESSURE_KPA.check(f"pressure_history_kPa[{index}]", value)
    tolerance = (
        dose_module.NAMED_TOLERANCES_PCT[dose_module.DEFAULT_TOLERANCE_NAME]
        if inputs.tolerance_pct is None
        else dose_module.tolerance_pct(inputs.tolerance_pct)
    )
    return _Checked(
        temperature_C=_optional(inputs.temperature_C, limits.TEMPERATURE_C, "temperature_C"),
        pressure_kPa=_optional(inputs.pressure_kPa, limits.PRESSURE_KPA, "pressure_kPa"),
        humidity_pct=_optional(inputs.humidity_pct, limits.HUMIDITY_PCT, "humidity_pct"),
        routine_bias_V=routine_V,
        voltage_ratio=n,
        leakage_nC=_optional(inputs.leakage_nC, limits.LEAKAGE_NC, "leakage_nC"),
        N_Dw_Gy_per_nC=_optional(inputs.N_Dw_Gy_per_nC, limits.N_DW_GY_PER_NC, "N_Dw_Gy_per_nC"),
        k_Q=_optional(inputs.k_Q, limits.K_Q, "k_Q"),
        k_elec=_optional(inputs.k_elec, limits.K_ELEC, "k_elec"),
        monitor_units=_optional(inputs.monitor_units, limits.MONITOR_UNITS, "monitor_units"),
        expected_cGy_per_MU=_optional(
            inputs.expected_cGy_per_MU, limits.EXPECTED_CGY_PER_MU, "expected_cGy_per_MU"
        ),
        tolerance_pct=tolerance,
        set_environments=check_set_environments(inputs.set_environments, SET_KEYS),
    )


def _check_cross_signs(sets: Mapping[str, SetStatistics | None]) -> None:
    """Refuse sets whose signs contradict their biases relative to one another.

    The routine and reduced-bias sets share a polarity; the opposite-polarity set has the
    other. The routine set, when there is one, sets the sign the others are held to.
    """
    relation = {"routine": 1.0, "reduced": 1.0, "opposite": -1.0}
    present = [key for key in SET_KEYS if sets[key] is not None]
    if len(present) < 2:
        return
    reference = present[0]
    routine_sign = relation[reference] * np.sign(sets[reference].mean_nC)
    for key in present[1:]:
        if np.sign(sets[key].mean_nC) != relation[key] * routine_sign:
            words = (
                "the opposite sign to"
                if relation[key] != relation[reference]
                else ("the same sign as")
            )
            raise InputError(
                f"{key}_nC",
                sets[key].mean_nC,
                f"charges of {words} the {stability.SET_NAMES[reference]} readings",
                "has a sign that contradicts its bias",
            )


def _reading_sets(
    inputs: MeasurementInputs,
) -> dict[str, SetStatistics | None]:
    sets: dict[str, SetStatistics | None] = {}
    threshold = inputs.thresholds.outlier_modified_z
    for key in SET_KEYS:
        readings = getattr(inputs, f"{key}_nC")
        if readings is None or len(readings) == 0:
            sets[key] = None
            continue
        values = readings_array(f"{key}_nC", readings)
        set_signs(f"{key}_nC", values)
        sets[key] = set_statistics(values, f"{key}_nC", threshold)
    _check_cross_signs(sets)
    return sets


# ---------------------------------------------------------------- the factors


def _pending(symbol: str, needs: str) -> Factor:
    return Factor(symbol, None, FactorState.PENDING, None, f"needs {needs}")


def _factor_k_TP(
    symbol: str, convention: Convention, air: SetEnvironment | None, u: Uncertainties
) -> Factor:
    """Return k_TP of the routine set's air (its own entry, else the session-wide one)."""
    if air is None:
        return _pending(symbol, "temperature and pressure")
    value = float(k_TP_of(air.temperature_C, air.pressure_kPa, convention))
    per_C, per_kPa = k_TP_relative_sensitivity(air.temperature_C, air.pressure_kPa)
    u_rel = 100.0 * float(np.hypot(per_C * u.u_temperature_C, per_kPa * u.u_pressure_kPa))
    reference = constants(convention)
    source = (
        f"{air.temperature_C:g} °C, {air.pressure_kPa:g} kPa → "
        f"{reference.reference_temperature_C:g} °C, {reference.reference_pressure_kPa:g} kPa"
    )
    if air.source != SESSION_WIDE:
        source += f" (routine set: {air.source})"
    return Factor(symbol, value, FactorState.MEASURED, u_rel, source)


def _factor_k_h(symbol: str, humidity_pct: float | None) -> Factor:
    """k_h is 1 by the protocols' rule, never computed: its state is "default" in every case."""
    band = f"{humidity.BAND_LOW_PCT:g}–{humidity.BAND_HIGH_PCT:g} % RH"
    if humidity_pct is None:
        source = f"no humidity entered; 1 assumed (holds for {band})"
    elif humidity.humidity_in_band(humidity_pct):
        source = f"{humidity_pct:g} % RH entered, within {band}: 1 by rule"
    else:
        source = f"{humidity_pct:g} % RH entered, outside {band}: 1 used, see flags"
    return Factor(symbol, 1.0, FactorState.DEFAULT, 0.0, source)


#: The polarity formula as each protocol prints it (they give the same number).
_K_POL_FORMULA = {
    Convention.TRS398: "(|M+| + |M−|) / (2|M|)",
    Convention.TG51: "|(M+ − M−) / (2M)|",
}


def _factor_k_pol(
    symbol: str,
    sets: Mapping[str, SetStatistics | None],
    convention: Convention,
    scales: Mapping[str, float],
) -> Factor:
    """Return k_pol of the means referred to the routine set's air (``scales``)."""
    routine, opposite = sets["routine"], sets["opposite"]
    if routine is None or opposite is None:
        return _pending(symbol, "routine and opposite-polarity readings")
    value = float(k_pol_of(routine.mean_nC, opposite.mean_nC * scales["opposite"]))
    u_rel = None
    if routine.standard_error_nC is not None and opposite.standard_error_nC is not None:
        share = abs(opposite.mean_nC) / (abs(routine.mean_nC) + abs(opposite.mean_nC))
        u_rel = share * float(
            np.hypot(routine.relative_standard_error_pct, opposite.relative_standard_error_pct)
        )
    source = _K_POL_FORMULA[convention]
    if scales["opposite"] != 1.0:
        source += "; opposite-polarity mean referred to the routine set's air"
    return Factor(symbol, value, FactorState.MEASURED, u_rel, source)


def _factor_k_s(
    symbol: str,
    sets: Mapping[str, SetStatistics | None],
    checked: _Checked,
    beam: Beam,
    convention: Convention,
    scales: Mapping[str, float],
) -> Factor:
    """Return k_s from M1/M2 of the means referred to the routine set's air (``scales``)."""
    routine, reduced = sets["routine"], sets["reduced"]
    if routine is None or reduced is None or checked.voltage_ratio is None:
        return _pending(symbol, "routine and reduced-bias readings and both biases")
    ratio = _charge_ratio(sets, scales)
    value = float(k_s_of(ratio, checked.voltage_ratio, beam, convention))
    u_rel = None
    if routine.standard_error_nC is not None and reduced.standard_error_nC is not None:
        sensitivity = abs(k_s_log_slope(ratio, checked.voltage_ratio, beam, convention))
        u_rel = sensitivity * float(
            np.hypot(routine.relative_standard_error_pct, reduced.relative_standard_error_pct)
        )
    source = f"n = {checked.voltage_ratio:g}, M1/M2 = {ratio:.5f}; " + recombination_method(
        beam, convention
    )
    if scales["reduced"] != 1.0:
        source += "; M2 referred to the routine set's air"
    return Factor(symbol, value, FactorState.MEASURED, u_rel, source)


def _factor_entered(
    symbol: str, value: float | None, u_rel_pct: float | None, needs: str, unit: str = ""
) -> Factor:
    if value is None:
        return _pending(symbol, needs)
    return Factor(symbol, value, FactorState.ENTERED, u_rel_pct, f"entered{unit}")


def _charge_ratio(
    sets: Mapping[str, SetStatistics | None], scales: Mapping[str, float]
) -> float | None:
    """Return M1/M2, the reduced-bias mean referred to the routine set's air; None without both."""
    routine, reduced = sets["routine"], sets["reduced"]
    if routine is None or reduced is None:
        return None
    return routine.mean_nC / (reduced.mean_nC * scales["reduced"])


def _set_air(
    checked: _Checked, sets: Mapping[str, SetStatistics | None], convention: Convention
) -> tuple[dict[str, SetAir], dict[str, float], SetEnvironment | None]:
    """Return (air of each set taken, mean scale per set, the routine set's air).

    The scale refers a set's mean to the routine set's air: k_TP(set) / k_TP(routine).
    """
    own = checked.set_environments
    routine_air = environment_of("routine", own, checked.temperature_C, checked.pressure_kPa)
    routine_k_TP = set_k_TP(routine_air, convention)
    air: dict[str, SetAir] = {}
    scales: dict[str, float] = {}
    for key in SET_KEYS:
        environment = environment_of(key, own, checked.temperature_C, checked.pressure_kPa)
        value = set_k_TP(environment, convention)
        scales[key] = air_scale(value, routine_k_TP)
        if sets[key] is not None and environment is not None and value is not None:
            air[key] = SetAir(
                environment.temperature_C,
                environment.pressure_kPa,
                environment.source,
                environment.entry,
                value,
            )
    return air, scales, routine_air


@dataclass(frozen=True)
class _AirReference:
    """How each set's mean is referred to the routine set's air, and the routine's offset."""

    scales: Mapping[str, float]
    routine: SetEnvironment | None
    leakage_subtracted_nC: float = 0.0


def _factors(
    inputs: MeasurementInputs,
    checked: _Checked,
    sets: Mapping[str, SetStatistics | None],
    convention: Convention,
    beam: Beam,
    scales: Mapping[str, float],
    routine_air: SetEnvironment | None,
) -> dict[str, Factor]:
    symbols = constants(convention).symbols
    u = inputs.uncertainties
    k_elec = (
        Factor(
            symbols["k_elec"],
            1.0,
            FactorState.DEFAULT,
            u.u_k_elec_pct or 0.0,
            "not entered; 1 (calibrated together)",
        )
        if checked.k_elec is None
        else Factor(
            symbols["k_elec"], checked.k_elec, FactorState.ENTERED, u.u_k_elec_pct, "entered"
        )
    )
    u_N_Dw = None if u.u_N_Dw_pct_k2 is None else u.u_N_Dw_pct_k2 / COVERAGE_FACTOR
    return {
        "k_TP": _factor_k_TP(symbols["k_TP"], convention, routine_air, u),
        "k_h": _factor_k_h(symbols["k_h"], checked.humidity_pct),
        "k_pol": _factor_k_pol(symbols["k_pol"], sets, convention, scales),
        "k_s": _factor_k_s(symbols["k_s"], sets, checked, beam, convention, scales),
        "k_elec": k_elec,
        "N_Dw": _factor_entered(
            symbols["N_Dw"],
            checked.N_Dw_Gy_per_nC,
            u_N_Dw,
            "the calibration coefficient",
            " (Gy/nC)",
        ),
        "k_Q": _factor_entered(symbols["k_Q"], checked.k_Q, u.u_k_Q_pct, "the beam quality factor"),
    }


# ---------------------------------------------------------------- results and uncertainty


def _product(factors: Mapping[str, Factor], keys: Sequence[str]) -> float | None:
    values = [factors[key].value for key in keys]
    return None if any(v is None for v in values) else float(np.prod(values))


def _model(
    inputs: MeasurementInputs,
    checked: _Checked,
    sets: Mapping[str, SetStatistics | None],
    factors: Mapping[str, Factor],
    convention: Convention,
    beam: Beam,
    air: _AirReference,
) -> ModelInputs:
    u = inputs.uncertainties

    def estimate(key: str) -> Estimate | None:
        """Return the set's mean referred to the routine air (the routine mean less any
        subtracted leakage) with its standard error, scaled alike."""
        stats = sets[key]
        if stats is None:
            return None
        scale = air.scales[key]
        error = None if stats.standard_error_nC is None else stats.standard_error_nC * scale
        offset = air.leakage_subtracted_nC if key == "routine" else 0.0
        return Estimate(stats.mean_nC * scale - offset, error)

    routine_air = air.routine
    has_k_TP = factors["k_TP"].state != FactorState.PENDING and routine_air is not None
    k_elec = factors["k_elec"]
    if k_elec.u_rel_pct is None:
        k_elec_source = NOT_GIVEN
    elif k_elec.state == FactorState.ENTERED:
        k_elec_source = f"Type B: electrometer calibration, u = {k_elec.u_rel_pct:g} %"
    else:
        k_elec_source = f"Type B: {k_elec.symbol} not entered (calibrated together), u = " + (
            f"{k_elec.u_rel_pct:g} %"
        )
    relative = (
        RelativeInput(k_elec.symbol, k_elec.u_rel_pct, k_elec_source),
        RelativeInput(
            f"{factors['N_Dw'].symbol} calibration coefficient",
            factors["N_Dw"].u_rel_pct,
            "Type B: certificate, U(k=2) halved" if u.u_N_Dw_pct_k2 is not None else NOT_GIVEN,
            in_charge=False,
        ),
        RelativeInput(
            factors["k_Q"].symbol,
            u.u_k_Q_pct,
            "Type B: code of practice" if u.u_k_Q_pct is not None else NOT_GIVEN,
            in_charge=False,
        ),
    )
    return ModelInputs(
        convention,
        beam,
        estimate("routine"),
        opposite_nC=estimate("opposite") if factors["k_pol"].state != FactorState.PENDING else None,
        reduced_nC=estimate("reduced") if factors["k_s"].state != FactorState.PENDING else None,
        voltage_ratio=checked.voltage_ratio
        if factors["k_s"].state != FactorState.PENDING
        else None,
        temperature_C=Estimate(routine_air.temperature_C, u.u_temperature_C) if has_k_TP else None,
        pressure_kPa=Estimate(routine_air.pressure_kPa, u.u_pressure_kPa) if has_k_TP else None,
        relative_inputs=relative,
    )


def _type_a_known(components: Sequence[Component]) -> bool:
    return all(c.u_rel_pct is not None for c in components if c.source.startswith("Type A"))


def _uncertainty_flags(components: Sequence[Component], dose_known: bool) -> list[Flag]:
    """Flag inputs whose uncertainty was not given, among those of the results computed."""
    missing = [
        c.component for c in components if c.source == NOT_GIVEN and (dose_known or c.in_charge)
    ]
    if not missing:
        return []
    result = "dose" if dose_known else "corrected charge"
    return [
        Flag(
            "uncertainty_incomplete",
            f"No uncertainty was entered for {' and '.join(missing)}: the combined uncertainty "
            f"leaves it out and understates the true uncertainty of the {result}.",
            "info",
        )
    ]


def _tolerance_flags(
    deviation: float | None, tolerance: float, expected: float | None
) -> list[Flag]:
    if deviation is None or abs(deviation) <= tolerance:
        return []
    return [
        Flag(
            "outside_tolerance",
            f"The dose per MU deviates by {deviation:+.2f} % from the expected "
            f"{expected:g} cGy/MU, outside the ±{tolerance:g} % tolerance. Check the set-up "
            "and every input before any adjustment; the physicist in charge decides.",
        )
    ]


def _tolerance_source(tolerance: float | str | None) -> str:
    if tolerance is None:
        return f"default: AAPM TG-142 {dose_module.DEFAULT_TOLERANCE_NAME} output constancy"
    if isinstance(tolerance, str):
        return f"entered as {tolerance.strip().lower()!r}: AAPM TG-142"
    return "entered"


def _session_flags(
    inputs: MeasurementInputs,
    checked: _Checked,
    sets: Mapping[str, SetStatistics | None],
    factors: Mapping[str, Factor],
    air: _AirReference,
) -> list[Flag]:
    limits_ = inputs.thresholds
    flags: list[Flag] = []
    for key in SET_KEYS:
        if sets[key] is not None:
            flags += stability.set_flags(key, sets[key], limits_)
    if factors["k_pol"].value is not None:
        flags += stability.k_pol_flags(factors["k_pol"].value, factors["k_pol"].symbol, limits_)
    if factors["k_s"].value is not None:
        flags += stability.k_s_flags(
            factors["k_s"].value,
            factors["k_s"].symbol,
            limits_,
            charge_ratio=_charge_ratio(sets, air.scales),
        )
    routine = sets["routine"]
    if routine is not None and checked.leakage_nC is not None:
        flags += stability.leakage_flags(
            checked.leakage_nC, routine.mean_nC, limits_, subtracted=inputs.subtract_leakage
        )
    if routine is not None and inputs.subtract_leakage and checked.leakage_nC is None:
        flags.append(
            Flag(
                "leakage_not_measured",
                "Leakage subtraction was chosen, but no leakage reading is known yet: nothing "
                "is subtracted.",
                "info",
            )
        )
    if routine is not None and checked.routine_bias_V is not None:
        flags += stability.sign_flags(checked.routine_bias_V, routine.mean_nC, limits_)
    own = list(checked.set_environments.values())
    temperatures = (
        list(inputs.temperature_history_C)
        + [e.temperature_C for e in own]
        + ([checked.temperature_C] if checked.temperature_C is not None else [])
    )
    pressures = (
        list(inputs.pressure_history_kPa)
        + [e.pressure_kPa for e in own]
        + ([checked.pressure_kPa] if checked.pressure_kPa is not None else [])
    )
    flags += stability.environment_flags(temperatures, pressures, limits_)
    flags += stability.humidity_flags(checked.humidity_pct)
    if factors["k_elec"].state == FactorState.DEFAULT:
        flags.append(
            Flag(
                "k_elec_assumed",
                f"No {factors['k_elec'].symbol} entered: 1 is used, as for a chamber and "
                "electrometer calibrated together. Enter the electrometer's calibration factor "
                "if they were calibrated separately.",
                "info",
            )
        )
    return flags


def evaluate(inputs: MeasurementInputs) -> Evaluation:
    """Return every factor, result, uncertainty and flag that ``inputs`` allow.

    Deterministic; never raises for missing data (dependent values are None); raises
    InputError naming the field, value and allowed range for invalid data.
    """
    convention = parse_convention(inputs.convention)
    beam = parse_beam(inputs.beam)
    checked = _check_scalars(inputs, convention, beam)
    sets = _reading_sets(inputs)
    set_air, scales, routine_air = _set_air(checked, sets, convention)
    factors = _factors(inputs, checked, sets, convention, beam, scales, routine_air)

    routine = sets["routine"]
    M_raw = None if routine is None else routine.mean_nC
    leakage_pct, subtracted_nC = _leakage(checked.leakage_nC, M_raw, inputs.subtract_leakage)
    air = _AirReference(scales, routine_air, subtracted_nC)
    charge_product = _product(factors, CHARGE_FACTOR_KEYS)
    M_corrected = (
        None
        if M_raw is None or charge_product is None
        else abs(M_raw - subtracted_nC) * charge_product
    )
    dose_product = _product(factors, ("N_Dw", "k_Q"))
    dose_Gy = None if M_corrected is None or dose_product is None else M_corrected * dose_product
    per_MU = None
    if dose_Gy is not None and checked.monitor_units is not None:
        per_MU = float(dose_module.dose_per_MU_cGy(dose_Gy, checked.monitor_units))
    deviation = None
    if per_MU is not None and checked.expected_cGy_per_MU is not None:
        deviation = float(dose_module.deviation_pct(per_MU, checked.expected_cGy_per_MU))

    components: tuple[Component, ...] = ()
    u_charge = u_dose = model = None
    if routine is not None:
        model = _model(inputs, checked, sets, factors, convention, beam, air)
        components = budget(model)
        if _type_a_known(components):
            charge_parts = [c for c in components if c.in_charge]
            u_charge = combine_pct(charge_parts) if M_corrected is not None else None
            u_dose = combine_pct(components) if dose_Gy is not None else None

    flags = _session_flags(inputs, checked, sets, factors, air)
    if M_corrected is not None:
        flags += _uncertainty_flags(components, dose_known=dose_Gy is not None)
    flags += _tolerance_flags(deviation, checked.tolerance_pct, checked.expected_cGy_per_MU)
    tolerance_source = _tolerance_source(inputs.tolerance_pct)
    charge_ratio = _charge_ratio(sets, scales)
    boag, boag_difference = _boag_cross_check(factors["k_s"], charge_ratio, checked, beam)
    return Evaluation(
        convention=convention,
        beam=beam,
        factors=MappingProxyType(factors),
        sets=MappingProxyType(sets),
        M_raw_nC=M_raw,
        M_corrected_nC=M_corrected,
        dose_Gy=dose_Gy,
        dose_per_MU_cGy=per_MU,
        expected_cGy_per_MU=checked.expected_cGy_per_MU,
        deviation_pct=deviation,
        tolerance_pct=checked.tolerance_pct,
        tolerance_source=tolerance_source,
        within_tolerance=None if deviation is None else abs(deviation) <= checked.tolerance_pct,
        u_M_corrected_pct=u_charge,
        u_combined_pct=u_dose,
        U_expanded_pct=None if u_dose is None else COVERAGE_FACTOR * u_dose,
        budget=components,
        flags=tuple(flags),
        voltage_ratio=checked.voltage_ratio,
        charge_ratio=charge_ratio,
        recombination_method=recombination_method(beam, convention),
        conversions=tuple(inputs.conversions),
        uncertainty_model=model,
        set_air=MappingProxyType(set_air),
        leakage_nC=checked.leakage_nC,
        leakage_pct=leakage_pct,
        leakage_subtracted=inputs.subtract_leakage and leakage_pct is not None,
        k_s_boag=boag,
        k_s_boag_difference_pct=boag_difference,
    )


def _leakage(
    leakage_nC: float | None, routine_mean_nC: float | None, subtract: bool
) -> tuple[float | None, float]:
    """Return (leakage in % of the routine mean, signed; the charge subtracted from it, nC).

    Subtracted only when the operator chose it; otherwise 0 is subtracted and the leakage is
    only reported.
    """
    if leakage_nC is None or routine_mean_nC is None:
        return None, 0.0
    share_pct = 100.0 * leakage_nC / routine_mean_nC
    return share_pct, leakage_nC if subtract else 0.0


def _boag_cross_check(
    k_s: Factor, charge_ratio: float | None, checked: _Checked, beam: Beam
) -> tuple[float | None, float | None]:
    """Return (k_s by Boag's pulsed-beam theory, the protocol's k_s relative to it in %).

    Shown beside the protocol's k_s for pulsed and pulsed-scanned beams: the tabulated
    quadratics are fits to this theory, so a difference well above 0.1 % deserves a look.
    None for continuous beams, a pending k_s, or a ratio the theory cannot reach.
    """
    if beam is Beam.CONTINUOUS or k_s.value is None or charge_ratio is None:
        return None, None
    try:
        boag = float(k_s_boag(charge_ratio, checked.voltage_ratio))
    except InputError:
        return None, None
    return boag, 100.0 * (k_s.value / boag - 1.0)
