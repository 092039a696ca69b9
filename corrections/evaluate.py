"""evaluate(): everything known about a session in, every result and flag out.

This is the one function the daemon's live results, the offline worksheet command, replay and
exports call, so every number an operator sees is computed here, once. Partial inputs are normal
(the daemon calls it after every reading): a factor whose inputs are missing is *pending*, and
every value depending on it is None, never computed as if the factor were 1. Invalid inputs
raise :class:`~chargebook.corrections.errors.InputError` naming the field, value and range.

Factor states, one rule for every factor (where its value comes from), are defined once in
:mod:`chargebook.corrections.factor_state`: measured, entered, default, carried (k_pol and k_s
of a routine output check, from an earlier full calibration, with source and date), pending.
k_h is always
1 here and its state "default": with 20–80 % RH entered the protocols' rule gives 1 (the source
says the entered humidity is in the band), with none entered 1 is assumed (flag
``k_h_assumed``), outside the band 1 is still used (warning ``humidity_out_of_band``). k_elec = 1
when none is entered ("default"), as for a chamber and electrometer calibrated together.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np
from chargebook.corrections import carried as carried_module
from chargebook.corrections import dose as dose_module
from chargebook.corrections import humidity, limits, plausibility, stability
from chargebook.corrections.air_density import k_TP as k_TP_of
from chargebook.corrections.air_density import k_TP_relative_sensitivity
from chargebook.corrections.beam_quality import (
    BeamQuality,
    check_quality,
    quality_dict,
    quality_flags,
)
from chargebook.corrections.carried import CARRIED_KEYS, CarriedFactor
from chargebook.corrections.conventions import Convention, constants, parse_convention
from chargebook.corrections.errors import Flag, InputError
from chargebook.corrections.factor_state import FactorState
from chargebook.corrections.monte_carlo import MonteCarloCheck, monte_carlo_check
from chargebook.corrections.polarity import k_pol as k_pol_of
from chargebook.corrections.recombination import (
    RATIO_RESOLUTION,
    Beam,
    k_s_boag,
    parse_beam,
    ratio_resolution,
    tabulated_coefficients,
    tabulated_row,
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
from chargebook.corrections.student_t import DEFAULT_COVERAGE_PROBABILITY, coverage_factor
from chargebook.corrections.uncertainty import (
    CERTIFICATE_COVERAGE_FACTOR,
    MONTE_CARLO_SEED,
    MONTE_CARLO_TRIALS,
    Component,
    Estimate,
    ModelInputs,
    RelativeInput,
    budget,
    combine_pct,
    effective_dof,
    k_s_log_slope,
)
from chargebook.corrections.units import Conversion

#: Factor keys in the order of the measurement model.
FACTOR_KEYS: tuple[str, ...] = ("k_TP", "k_h", "k_pol", "k_s", "k_elec", "N_Dw", "k_Q")
#: Keys of the factors that make up the corrected charge (the rest turn it into dose).
CHARGE_FACTOR_KEYS: tuple[str, ...] = ("k_TP", "k_h", "k_pol", "k_s", "k_elec")
SET_KEYS: tuple[str, ...] = ("routine", "opposite", "reduced")
#: The sets that may have air of their own (``set_environments``): the result sets and the
#: return check, whose mean is referred to the routine set's air before it is compared.
AIR_KEYS: tuple[str, ...] = (*SET_KEYS, "return")
#: Budget source of a Type B input whose uncertainty was not given (flagged, never taken as 0).
NOT_GIVEN = "not given: left out of u_c"


@dataclass(frozen=True)
class Uncertainties:
    """Type B inputs, with documented defaults.

    ``u_N_Dw_pct_k2``: N_D,w's expanded uncertainty as on the calibration certificate, divided
    here by the certificate's coverage factor ``k_N_Dw`` (2 unless the certificate states
    another); None: not given, left out of u_c and flagged. ``u_k_Q_pct``: k_Q's standard
    uncertainty (%); None: likewise. ``u_k_elec_pct``: k_elec's standard uncertainty (%); None
    with no k_elec entered means 0 (chamber and electrometer calibrated together: N_D,w's
    uncertainty covers both), None with a k_elec entered means not given: left out of u_c and
    flagged, never taken as 0. ``u_temperature_C``: thermometer, 0.1 °C
    (a calibrated probe; common practice). ``u_pressure_kPa``: barometer, 0.05 kPa (a calibrated
    digital barometer; common practice). ``coverage_probability``: of the expanded
    uncertainty, 0.95 by default (common practice).
    """

    u_N_Dw_pct_k2: float | None = None
    u_k_Q_pct: float | None = None
    u_k_elec_pct: float | None = None
    u_temperature_C: float = 0.1
    u_pressure_kPa: float = 0.05
    k_N_Dw: float = CERTIFICATE_COVERAGE_FACTOR
    coverage_probability: float = DEFAULT_COVERAGE_PROBABILITY
    #: The user's own components, relative standard uncertainties in % (None: not in the
    #: budget): establishment of the reference conditions (depth, SSD, field), long-term
    #: stability of the dosimeter, beam monitor and output stability between sets, and the
    #: electrometer's resolution (the codes of practice list them; see docs/physics.md).
    u_reference_conditions_pct: float | None = None
    u_long_term_stability_pct: float | None = None
    u_beam_monitor_pct: float | None = None
    u_electrometer_resolution_pct: float | None = None


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
    ``set_environments`` gives, per set ("routine", "opposite", "reduced", "return"), the air
    in which that set was taken; a set without one uses ``temperature_C`` and ``pressure_kPa``.
    Each set's mean is referred to reference air with its own k_TP before k_pol and k_s are
    formed and before the return check is compared with the routine set
    (:mod:`chargebook.corrections.set_air`); the routine set's k_TP is the result's.
    ``subtract_leakage``: subtract ``leakage_nC`` from the routine mean (the operator's choice;
    off by default, the leakage is then only reported as a percentage of the routine reading).
    ``carried``: k_pol and/or k_s carried from an earlier full calibration (state "carried");
    a factor both carried and measured (its readings given) is refused. ``measured_on``: the
    measurement's date (YYYY-MM-DD); a carried factor dated after it is refused, one older
    than ``thresholds.carried_max_age_days`` is flagged. None: neither is checked.
    ``not_measured``: the factors (k_pol, k_s) this measurement will not measure (its plan has
    no such step, or a worksheet no such readings); one of them still pending is flagged.
    ``quality``: the modality and, for an electron beam, R50, the chamber type and k_Q's
    source (:mod:`chargebook.corrections.beam_quality`); the default is a photon beam.
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
    #: The plan's return to the routine setting at the end (same bias and polarity).
    return_nC: Sequence[float] = ()
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
    carried: Mapping[str, CarriedFactor] = field(default_factory=dict)
    measured_on: str | None = None
    not_measured: tuple[str, ...] = ()
    quality: BeamQuality = field(default_factory=BeamQuality)


@dataclass(frozen=True)
class Factor:
    """One factor of the model: its printed symbol, value, state, relative u (%) and source."""

    symbol: str
    value: float | None
    state: str
    u_rel_pct: float | None = None
    source: str = ""


#: The user's components: Uncertainties field -> budget line.
USER_COMPONENTS: Mapping[str, str] = MappingProxyType(
    {
        "u_reference_conditions_pct": "establishment of reference conditions",
        "u_long_term_stability_pct": "long-term stability of the dosimeter",
        "u_beam_monitor_pct": "beam monitor and output stability between sets",
        "u_electrometer_resolution_pct": "electrometer resolution",
    }
)


@dataclass(frozen=True)
class ReturnCheck:
    """The return to the routine setting at the end of the session, compared with the start.

    ``ratio``: return-check mean / routine mean; ``deviation_pct`` = 100 (ratio − 1);
    ``between_set_u_pct``: the between-set standard deviation this implies beyond the two sets'
    own scatter, sqrt(max(0, d²/2 − (u_r² + u_ret²)/2)) in %, with 1 degree of freedom.
    """

    stats: SetStatistics
    ratio: float
    deviation_pct: float
    between_set_u_pct: float | None
    #: k_TP(return set's air) / k_TP(routine set's air): 1.0 when both were taken in one air.
    air_scale: float = 1.0

    def to_dict(self) -> dict[str, object]:
        """Return the check as JSON-ready plain types."""
        return {
            "set": self.stats.to_dict(),
            "ratio": self.ratio,
            "deviation_pct": self.deviation_pct,
            "between_set_u_pct": self.between_set_u_pct,
            "air_scale": self.air_scale,
        }


def return_check(
    routine: SetStatistics, returned: SetStatistics, air_scale_: float = 1.0
) -> ReturnCheck:
    """Return the return-to-start comparison of two sets at the routine setting.

    ``air_scale_`` = k_TP(return set's air) / k_TP(routine set's air) refers the return-check
    mean to the routine set's air first, so a change of air is not taken for a change of output.
    """
    ratio = returned.mean_nC * air_scale_ / routine.mean_nC
    deviation = 100.0 * (ratio - 1.0)
    u_between = None
    u_r, u_ret = routine.relative_standard_error_pct, returned.relative_standard_error_pct
    if u_r is not None and u_ret is not None:
        u_between = math.sqrt(max(0.0, deviation**2 / 2.0 - (u_r**2 + u_ret**2) / 2.0))
    return ReturnCheck(returned, ratio, deviation, u_between, air_scale_)


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
    #: the Monte Carlo cross-check (:meth:`monte_carlo`).
    uncertainty_model: ModelInputs | None = None
    #: Effective degrees of freedom of u_c (Welch–Satterthwaite; inf: all Type B), the
    #: coverage factor k = t_{(1+p)/2}(ν_eff) and p, the coverage probability of U = k·u_c.
    effective_dof: float | None = None
    coverage_factor: float | None = None
    coverage_probability: float = DEFAULT_COVERAGE_PROBABILITY
    #: The return to the routine setting compared with the routine set (None: not taken).
    return_check: ReturnCheck | None = None

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
    #: The carried factors used (key -> CarriedFactor) and the measurement's date they were
    #: checked against (YYYY-MM-DD, None if not given).
    carried: Mapping[str, CarriedFactor] = field(default_factory=dict)
    measured_on: str | None = None
    #: The checked modality, R50 and z_ref (electrons), chamber type and k_Q's source.
    quality: BeamQuality = field(default_factory=BeamQuality)

    def monte_carlo(
        self, trials: int = MONTE_CARLO_TRIALS, seed: int = MONTE_CARLO_SEED
    ) -> MonteCarloCheck:
        """Return the seeded Monte Carlo cross-check of u_c and U (never raises)."""
        return monte_carlo_check(
            self.uncertainty_model,
            self.u_combined_pct,
            self.U_expanded_pct,
            self.coverage_probability,
            trials,
            seed,
        )

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
                "effective_dof": (
                    None
                    if self.effective_dof is None or not math.isfinite(self.effective_dof)
                    else self.effective_dof
                ),
                "effective_dof_infinite": self.effective_dof is not None
                and not math.isfinite(self.effective_dof),
                "coverage_factor": self.coverage_factor,
                "coverage_probability": self.coverage_probability,
                "return_check": None if self.return_check is None else self.return_check.to_dict(),
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
                "carried": {key: self._carried_dict(key) for key in self.carried},
                **quality_dict(self.quality),
            }
        )
        return result

    def _carried_dict(self, key: str) -> dict[str, object]:
        """Return a carried factor's plain values with its age (days) on the measurement date."""
        factor = self.carried[key]
        age = None if self.measured_on is None else factor.age_days(self.measured_on)
        return {**factor.to_dict(), "age_days": age}


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
    #: The voltage ratio k_s is computed with: the tabulated row n equals to the setting
    #: resolution, or n itself (formulas, Boag's theory).
    k_s_ratio: float | None
    #: k_s by Boag's theory: the user's choice for a ratio off the TRS-398 (2000) table.
    use_boag: bool
    leakage_nC: float | None
    N_Dw_Gy_per_nC: float | None
    k_Q: float | None
    k_elec: float | None
    monitor_units: float | None
    expected_cGy_per_MU: float | None
    tolerance_pct: float
    set_environments: Mapping[str, SetEnvironment]
    carried: Mapping[str, CarriedFactor]


def _check_carried(inputs: MeasurementInputs) -> dict[str, CarriedFactor]:
    """Return the carried factors checked again (range, date not after ``measured_on``)."""
    if inputs.measured_on is not None:
        carried_module.parse_date("measured_on", inputs.measured_on)
    checked: dict[str, CarriedFactor] = {}
    for key, factor in inputs.carried.items():
        if key not in CARRIED_KEYS:
            raise InputError(f"carried.{key}", key, " or ".join(CARRIED_KEYS), "is not known")
        table = factor.to_dict() if isinstance(factor, CarriedFactor) else factor
        checked[key] = carried_module.carried_factor(f"carried.{key}", table, inputs.measured_on)
    return checked


def _check_bias(inputs: MeasurementInputs) -> tuple[float | None, float | None, float | None]:
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
        return routine, None, None
    n = voltage_ratio(routine, reduced, fields=("routine_bias_V", "reduced_bias_V"))
    resolution = ratio_resolution(routine, reduced, inputs.thresholds.bias_resolution_V)
    return routine, float(n), resolution


def _k_s_ratio(
    n: float | None, resolution: float | None, convention: Convention, beam: Beam, boag: bool
) -> tuple[float | None, bool]:
    """Return (the ratio k_s is computed with, by Boag's theory?) and refuse an off-table n.

    Under TRS-398 (2000) a pulsed beam's k_s comes from the table's row that n equals to the setting
    resolution; an n off the table is refused now, before any reduced-bias reading is taken,
    unless the user chose Boag's theory for it.
    """
    if n is None or convention is not Convention.TRS398 or beam is Beam.CONTINUOUS:
        return n, False
    row = tabulated_row(n, beam, resolution)
    if row is not None:
        return row, False
    if boag:
        return n, True
    tabulated_coefficients(n, beam, "voltage ratio routine_bias_V/reduced_bias_V", resolution)
    return n, False  # not reached: the call above refused n


def _check_uncertainties(u: Uncertainties) -> None:
    for name in ("u_N_Dw_pct_k2", "u_k_Q_pct", "u_k_elec_pct", *USER_COMPONENTS):
        _optional(getattr(u, name), limits.UNCERTAINTY_PCT, f"uncertainties.{name}")
    limits.U_TEMPERATURE_C.check("uncertainties.u_temperature_C", u.u_temperature_C)
    limits.U_PRESSURE_KPA.check("uncertainties.u_pressure_kPa", u.u_pressure_kPa)
    limits.CERTIFICATE_K.check("uncertainties.k_N_Dw", u.k_N_Dw)
    limits.COVERAGE_PROBABILITY.check("uncertainties.coverage_probability", u.coverage_probability)


def _check_scalars(inputs: MeasurementInputs, convention: Convention, beam: Beam) -> _Checked:
    routine_V, n, resolution = _check_bias(inputs)
    boag = inputs.thresholds.recombination_off_table == "boag"
    k_s_ratio, use_boag = _k_s_ratio(n, resolution, convention, beam, boag)
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
        k_s_ratio=k_s_ratio,
        use_boag=use_boag,
        leakage_nC=_optional(inputs.leakage_nC, limits.LEAKAGE_NC, "leakage_nC"),
        N_Dw_Gy_per_nC=_optional(inputs.N_Dw_Gy_per_nC, limits.N_DW_GY_PER_NC, "N_Dw_Gy_per_nC"),
        k_Q=_optional(inputs.k_Q, limits.K_Q, "k_Q"),
        k_elec=_optional(inputs.k_elec, limits.K_ELEC, "k_elec"),
        monitor_units=_optional(inputs.monitor_units, limits.MONITOR_UNITS, "monitor_units"),
        expected_cGy_per_MU=_optional(
            inputs.expected_cGy_per_MU, limits.EXPECTED_CGY_PER_MU, "expected_cGy_per_MU"
        ),
        tolerance_pct=tolerance,
        set_environments=check_set_environments(inputs.set_environments, AIR_KEYS),
        carried=_check_carried(inputs),
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
    floor = inputs.thresholds.outlier_floor_pct
    for key in SET_KEYS:
        readings = getattr(inputs, f"{key}_nC")
        if readings is None or len(readings) == 0:
            sets[key] = None
            continue
        values = readings_array(f"{key}_nC", readings)
        set_signs(f"{key}_nC", values)
        sets[key] = set_statistics(values, f"{key}_nC", threshold, floor)
    _check_cross_signs(sets)
    return sets


def _return_check(
    inputs: MeasurementInputs,
    sets: Mapping[str, SetStatistics | None],
    checked: _Checked,
    convention: Convention,
) -> ReturnCheck | None:
    """Return the return check, its mean referred to the routine set's air (None: not taken)."""
    if not inputs.return_nC or sets["routine"] is None:
        return None
    values = readings_array("return_nC", inputs.return_nC)
    set_signs("return_nC", values)
    stats = set_statistics(
        values,
        "return_nC",
        inputs.thresholds.outlier_modified_z,
        inputs.thresholds.outlier_floor_pct,
    )
    if np.sign(stats.mean_nC) != np.sign(sets["routine"].mean_nC):
        raise InputError(
            "return_nC",
            stats.mean_nC,
            "charges of the same sign as the routine readings",
            "has a sign that contradicts its bias",
        )
    own, T, P = checked.set_environments, checked.temperature_C, checked.pressure_kPa
    scale = air_scale(
        set_k_TP(environment_of("return", own, T, P), convention),
        set_k_TP(environment_of("routine", own, T, P), convention),
    )
    return return_check(sets["routine"], stats, scale)


def _return_flags(check: ReturnCheck | None, limits_: Thresholds) -> list[Flag]:
    if check is None:
        return []
    flags = stability.set_flags("return", check.stats, limits_)
    if abs(check.deviation_pct) > limits_.return_check_pct:
        flags.append(
            Flag(
                "return_check_moved",
                f"The return-check readings differ from the routine ones by "
                f"{check.deviation_pct:+.3f} % (ratio {check.ratio:.5f}), beyond "
                f"±{limits_.return_check_pct:g} %: the beam output, the monitor chamber or the "
                "chamber's response moved during the session. Check the beam output and the "
                "set-up, then redo the routine set; the difference is in the budget as a "
                "between-set term.",
            )
        )
    return flags


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
    n, boag = checked.k_s_ratio, checked.use_boag
    value = float(k_s_of(ratio, n, beam, convention, boag))
    u_rel = None
    if routine.standard_error_nC is not None and reduced.standard_error_nC is not None:
        sensitivity = abs(k_s_log_slope(ratio, n, beam, convention, boag))
        u_rel = sensitivity * float(
            np.hypot(routine.relative_standard_error_pct, reduced.relative_standard_error_pct)
        )
    source = f"n = {checked.voltage_ratio:.6g}, M1/M2 = {ratio:.5f}; " + recombination_method(
        beam, convention, boag
    )
    if scales["reduced"] != 1.0:
        source += "; M2 referred to the routine set's air"
    return Factor(symbol, value, FactorState.MEASURED, u_rel, source)


def _carried_or(
    key: str, checked: _Checked, sets: Mapping[str, SetStatistics | None], measured: Factor
) -> Factor:
    """Return the carried factor for ``key`` if one is given, else ``measured``.

    A factor both carried and measured (its set's readings given) is refused: which value
    counts would otherwise be a silent choice.
    """
    factor = checked.carried.get(key)
    if factor is None:
        return measured
    set_key = carried_module.MEASURED_BY[key]
    if sets[set_key] is not None:
        raise InputError(
            f"carried.{key}",
            factor.value,
            f"either {stability.SET_NAMES[set_key]} readings or a carried {key}, not both",
            "is both measured and carried",
        )
    return Factor(
        measured.symbol,
        factor.value,
        FactorState.CARRIED,
        factor.u_pct,
        carried_module.state_source(factor),
    )


def _carried_inputs(factors: Mapping[str, Factor], checked: _Checked) -> tuple[RelativeInput, ...]:
    """Return the Type B budget lines of the carried factors (u not known: not given)."""
    lines = []
    for key, factor in checked.carried.items():
        source = (
            NOT_GIVEN
            if factor.u_pct is None
            else f"Type B: carried ({factor.u_source}), u = {factor.u_pct:g} %"
        )
        lines.append(RelativeInput(f"{factors[key].symbol} carried", factor.u_pct, source))
    return tuple(lines)


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
    u_N_Dw = None if u.u_N_Dw_pct_k2 is None else u.u_N_Dw_pct_k2 / u.k_N_Dw
    return {
        "k_TP": _factor_k_TP(symbols["k_TP"], convention, routine_air, u),
        "k_h": _factor_k_h(symbols["k_h"], checked.humidity_pct),
        "k_pol": _carried_or(
            "k_pol", checked, sets, _factor_k_pol(symbols["k_pol"], sets, convention, scales)
        ),
        "k_s": _carried_or(
            "k_s",
            checked,
            sets,
            _factor_k_s(symbols["k_s"], sets, checked, beam, convention, scales),
        ),
        "k_elec": k_elec,
        "N_Dw": _factor_entered(
            symbols["N_Dw"],
            checked.N_Dw_Gy_per_nC,
            u_N_Dw,
            "the calibration coefficient",
            " (Gy/nC)",
        ),
        "k_Q": _factor_entered(
            symbols["k_Q"],
            checked.k_Q,
            u.u_k_Q_pct,
            "the beam quality factor",
            f" ({inputs.quality.k_Q_source})" if inputs.quality.k_Q_source else "",
        ),
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
    returned: ReturnCheck | None = None,
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
        return Estimate(stats.mean_nC * scale - offset, error, float(stats.count - 1))

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
            (
                f"Type B: certificate, U divided by its k = {u.k_N_Dw:g}"
                if u.u_N_Dw_pct_k2 is not None
                else NOT_GIVEN
            ),
            in_charge=False,
        ),
        RelativeInput(
            factors["k_Q"].symbol,
            u.u_k_Q_pct,
            (
                f"Type B: {inputs.quality.k_Q_source or 'code of practice'}"
                if u.u_k_Q_pct is not None
                else NOT_GIVEN
            ),
            in_charge=False,
        ),
        *_carried_inputs(factors, checked),
        *(
            RelativeInput(name, getattr(u, key), "Type B: entered by the user")
            for key, name in USER_COMPONENTS.items()
            if getattr(u, key) is not None
        ),
        *(
            [
                RelativeInput(
                    "between-set stability (return check)",
                    returned.between_set_u_pct,
                    "Type A: routine and return-check means, 1 degree of freedom",
                    dof=1.0,
                )
            ]
            if returned is not None and returned.between_set_u_pct is not None
            else []
        ),
    )
    return ModelInputs(
        convention,
        beam,
        estimate("routine"),
        opposite_nC=estimate("opposite") if factors["k_pol"].state != FactorState.PENDING else None,
        reduced_nC=estimate("reduced") if factors["k_s"].state != FactorState.PENDING else None,
        voltage_ratio=checked.k_s_ratio if factors["k_s"].state != FactorState.PENDING else None,
        temperature_C=Estimate(routine_air.temperature_C, u.u_temperature_C) if has_k_TP else None,
        pressure_kPa=Estimate(routine_air.pressure_kPa, u.u_pressure_kPa) if has_k_TP else None,
        relative_inputs=relative,
        use_boag=checked.use_boag,
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
    for key in inputs.not_measured:
        if factors[key].state == "pending":
            set_name = stability.SET_NAMES[carried_module.MEASURED_BY[key]]
            flags.append(carried_module.not_measured_flag(key, factors[key].symbol, set_name))
    for key, carried in checked.carried.items():
        flags += carried_module.age_flags(
            key, factors[key].symbol, carried, inputs.measured_on, limits_.carried_max_age_days
        )
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


def _pressure_as_entered(
    pressure_kPa: float | None, conversions: Sequence[Conversion]
) -> tuple[float, str] | None:
    """Return (the pressure as typed, its unit), from the recorded conversion if one was made."""
    if pressure_kPa is None:
        return None
    for conversion in conversions:
        if conversion.quantity == "pressure" and conversion.converted_value == pressure_kPa:
            return conversion.value, conversion.unit
    return pressure_kPa, "kPa"


#: TRS-398 recommends a voltage ratio V1/V2 of at least 3 for the two-voltage method (TRS-398
#: (2000), from memory); 2 and 2.5 are tabulated and allowed.
TRS398_RECOMMENDED_MINIMUM_RATIO = 3.0


def _protocol_flags(
    checked: _Checked,
    convention: Convention,
    beam: Beam,
    symbol: str,
    charge_ratio: float | None = None,
) -> list[Flag]:
    """Return flags for a voltage ratio or beam the protocol allows only with a caveat."""
    n = checked.voltage_ratio
    if n is None:
        return []
    flags = []
    if checked.use_boag:
        flags.append(
            Flag(
                "k_s_by_boag",
                f"The voltage ratio n = {n:.6g} is not a row of the TRS-398 (2000) table, so "
                f"{symbol} was computed with Boag's theory for pulsed beams, as chosen "
                '(thresholds.recombination_off_table = "boag"). The table\'s rows are fits to '
                "that theory; state the method with the result.",
                "info",
            )
        )
    low = n < TRS398_RECOMMENDED_MINIMUM_RATIO - RATIO_RESOLUTION
    if convention is Convention.TRS398 and low:
        flags.append(
            Flag(
                "voltage_ratio_below_3",
                f"The voltage ratio V1/V2 = {n:.6g} is below 3. TRS-398 (2000) tabulates n = 2 "
                "and 2.5 but recommends a ratio of at least 3: a small ratio makes k_s more "
                "sensitive to the scatter of the two sets. Allowed; use V1/V2 >= 3 where the "
                "electrometer allows it.",
                "info",
            )
        )
    if convention is Convention.TG51 and beam is Beam.PULSED_SCANNED:
        flags.append(_tg51_scanned_flag(n, charge_ratio, symbol))
    return flags


def _tg51_scanned_flag(n: float, charge_ratio: float | None, symbol: str) -> Flag:
    """Return the flag saying a pulsed-scanned beam got TG-51's pulsed linear P_ion."""
    comparison = ""
    row = tabulated_row(n, Beam.PULSED_SCANNED)
    if charge_ratio is not None and row is not None:
        linear = float(k_s_of(charge_ratio, n, Beam.PULSED, Convention.TG51))
        scanned = float(k_s_of(charge_ratio, row, Beam.PULSED_SCANNED, Convention.TRS398))
        comparison = (
            f" Here the linear form gives {linear:.4f}; TRS-398 (2000)'s pulsed-scanned "
            f"coefficients would give {scanned:.4f} ({100 * (scanned / linear - 1):+.2f} %)."
        )
    return Flag(
        "tg51_pulsed_scanned",
        f"For this pulsed-scanned beam {symbol} is TG-51's linear two-voltage formula "
        "(1 − n)/(M1/M2 − n), the one it gives for pulsed beams: it has no separate method for "
        "scanned beams, whose dose per pulse varies across the field." + comparison + " Check "
        "which your code of practice asks for.",
    )


def evaluate(inputs: MeasurementInputs) -> Evaluation:
    """Return every factor, result, uncertainty and flag that ``inputs`` allow.

    Deterministic; never raises for missing data (dependent values are None); raises
    InputError naming the field, value and allowed range for invalid data.
    """
    convention = parse_convention(inputs.convention)
    beam = parse_beam(inputs.beam)
    quality = check_quality(inputs.quality, beam)
    inputs = dataclasses.replace(inputs, quality=quality)
    checked = _check_scalars(inputs, convention, beam)
    sets = _reading_sets(inputs)
    returned = _return_check(inputs, sets, checked, convention)
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
        model = _model(inputs, checked, sets, factors, convention, beam, air, returned)
        components = budget(model)
        if _type_a_known(components):
            charge_parts = [c for c in components if c.in_charge]
            u_charge = combine_pct(charge_parts) if M_corrected is not None else None
            u_dose = combine_pct(components) if dose_Gy is not None else None
    probability = inputs.uncertainties.coverage_probability
    nu_eff = k = U = None
    if u_dose is not None:
        nu_eff = effective_dof(components)
        k = coverage_factor(nu_eff, probability)
        U = k * u_dose

    flags = _session_flags(inputs, checked, sets, factors, air)
    flags += plausibility.flags(
        plausibility.Entered(
            pressure=_pressure_as_entered(checked.pressure_kPa, inputs.conversions),
            N_Dw_Gy_per_nC=checked.N_Dw_Gy_per_nC,
            k_TP=factors["k_TP"].value,
            dose_per_MU_cGy=per_MU,
            set_means_nC={key: stats.mean_nC for key, stats in sets.items() if stats},
        )
    )
    charge_ratio = _charge_ratio(sets, scales)
    flags += _protocol_flags(checked, convention, beam, factors["k_s"].symbol, charge_ratio)
    flags += _return_flags(returned, inputs.thresholds)
    flags += quality_flags(quality, convention)
    if M_corrected is not None:
        flags += _uncertainty_flags(components, dose_known=dose_Gy is not None)
    flags += _tolerance_flags(deviation, checked.tolerance_pct, checked.expected_cGy_per_MU)
    tolerance_source = _tolerance_source(inputs.tolerance_pct)
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
        U_expanded_pct=U,
        budget=components,
        flags=tuple(flags),
        voltage_ratio=checked.voltage_ratio,
        charge_ratio=charge_ratio,
        recombination_method=recombination_method(beam, convention),
        conversions=tuple(inputs.conversions),
        uncertainty_model=model,
        effective_dof=nu_eff,
        coverage_factor=k,
        coverage_probability=probability,
        return_check=returned,
        set_air=MappingProxyType(set_air),
        leakage_nC=checked.leakage_nC,
        leakage_pct=leakage_pct,
        leakage_subtracted=inputs.subtract_leakage and leakage_pct is not None,
        k_s_boag=boag,
        k_s_boag_difference_pct=boag_difference,
        carried=MappingProxyType(dict(checked.carried)),
        measured_on=inputs.measured_on,
        quality=quality,
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
