"""Benchmark: every correction for a million stored readings, vectorised, against a Python loop.

    python -m tests.bench.reanalysis [--smoke]

A station's record, re-analysed: 100,000 sessions of ten readings each (four at the routine
setting, three at the opposite polarity, three at the reduced bias), every reading with the air
temperature and pressure logged when it was taken: 1,000,000 readings. The columns are made up
here (invented, seeded, benchmark only), as they would come out of the station database; loading
them is left out of both timings.

* Measured, vectorised: ``corrections.batch.evaluate_sessions`` gives every session's k_TP,
  k_pol, k_s, k_elec, corrected charge, dose, dose per MU and deviation; then
  ``corrections.batch.corrected_readings_nC`` gives every reading's corrected charge with its
  own k_TP and its session's k_pol, k_s and k_elec.
* Baseline: the same through the same scalar functions (``k_TP``, ``k_pol``, ``k_s``,
  ``dose_to_water_Gy`` ...) in a Python loop over sessions and readings.

Both must agree to 1e-12 (relative), or the run fails. Targets (issue 7): the vectorised run
takes under 2 s and is at least 20 times faster than the loop.
"""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass

import numpy as np
from chargebook.corrections.air_density import k_TP
from chargebook.corrections.batch import corrected_readings_nC, evaluate_sessions
from chargebook.corrections.dose import deviation_pct, dose_per_MU_cGy, dose_to_water_Gy
from chargebook.corrections.polarity import k_pol
from chargebook.corrections.recombination import k_s, voltage_ratio

from tests.bench import report

FULL_SESSIONS = 100_000
SMOKE_SESSIONS = 1_000
ROUTINE, OPPOSITE, REDUCED = 4, 3, 3
READINGS_PER_SESSION = ROUTINE + OPPOSITE + REDUCED
TIME_TARGET_S = 2.0
SPEED_TARGET = 20.0
AGREEMENT = 1e-12
#: The session settings, invented for the benchmark (plausible for a 0.6 cc chamber, 6 MV).
ROUTINE_BIAS_V, REDUCED_BIAS_V = 300.0, 100.0
N_DW_GY_PER_NC, K_Q, K_ELEC = 0.0504, 0.992, 1.0
MONITOR_UNITS, EXPECTED_CGY_PER_MU = 100.0, 1.0


@dataclass(frozen=True)
class Record:
    """The stored columns: charges (sessions × readings, nC), and each reading's T (°C), P (kPa).

    Columns 0–3 are routine readings, 4–6 opposite polarity, 7–9 reduced bias.
    """

    charge_nC: np.ndarray
    temperature_C: np.ndarray
    pressure_kPa: np.ndarray

    @property
    def routine(self) -> np.ndarray:
        return self.charge_nC[:, :ROUTINE]

    @property
    def opposite(self) -> np.ndarray:
        return self.charge_nC[:, ROUTINE : ROUTINE + OPPOSITE]

    @property
    def reduced(self) -> np.ndarray:
        return self.charge_nC[:, ROUTINE + OPPOSITE :]


def make_record(sessions: int, seed: int = 20_240_601) -> Record:
    """Return an invented record of ``sessions`` sessions (seeded, so every run is the same)."""
    rng = np.random.default_rng(seed)
    level = rng.normal(20.0, 0.3, (sessions, 1))  # each session's beam output, nC
    noise = rng.normal(1.0, 3e-4, (sessions, READINGS_PER_SESSION))
    scale = np.array([1.0] * ROUTINE + [-1.002] * OPPOSITE + [0.994] * REDUCED)
    drift_C = rng.normal(0.0, 0.05, (sessions, READINGS_PER_SESSION)).cumsum(axis=1)
    return Record(
        charge_nC=level * noise * scale,
        temperature_C=rng.uniform(18.0, 25.0, (sessions, 1)) + drift_C,
        pressure_kPa=rng.uniform(97.0, 104.0, (sessions, 1))
        + rng.normal(0.0, 0.01, (sessions, READINGS_PER_SESSION)),
    )


def vectorised(record: Record) -> tuple[np.ndarray, np.ndarray]:
    """Return (each session's dose in Gy, each reading's corrected charge in nC), vectorised."""
    sessions = evaluate_sessions(
        record.routine,
        record.opposite,
        record.reduced,
        temperature_C=record.temperature_C[:, 0],  # the session's entry: its first reading's
        pressure_kPa=record.pressure_kPa[:, 0],
        routine_bias_V=ROUTINE_BIAS_V,
        reduced_bias_V=REDUCED_BIAS_V,
        N_Dw_Gy_per_nC=N_DW_GY_PER_NC,
        k_Q=K_Q,
        k_elec=K_ELEC,
        monitor_units=MONITOR_UNITS,
        expected_cGy_per_MU=EXPECTED_CGY_PER_MU,
    )
    readings = corrected_readings_nC(
        record.charge_nC,
        record.temperature_C,
        record.pressure_kPa,
        k_pol=sessions.k_pol[:, None],
        k_s=sessions.k_s[:, None],
        k_elec=K_ELEC,
    )
    return sessions.dose_Gy, readings


def looped(record: Record) -> tuple[np.ndarray, np.ndarray]:
    """Return the same as :func:`vectorised`, one session and one reading at a time."""
    charges = record.charge_nC.tolist()
    temperatures = record.temperature_C.tolist()
    pressures = record.pressure_kPa.tolist()
    n = voltage_ratio(ROUTINE_BIAS_V, REDUCED_BIAS_V)
    doses, corrected = [], []
    for row, row_T, row_P in zip(charges, temperatures, pressures, strict=True):
        M = sum(row[:ROUTINE]) / ROUTINE
        M_opposite = sum(row[ROUTINE : ROUTINE + OPPOSITE]) / OPPOSITE
        M_reduced = sum(row[ROUTINE + OPPOSITE :]) / REDUCED
        polarity = k_pol(M, M_opposite)
        recombination = k_s(M / M_reduced, n)
        M_corrected = abs(M) * k_TP(row_T[0], row_P[0]) * polarity * recombination * K_ELEC
        dose = dose_to_water_Gy(M_corrected, N_DW_GY_PER_NC, K_Q)
        deviation_pct(dose_per_MU_cGy(dose, MONITOR_UNITS), EXPECTED_CGY_PER_MU)
        doses.append(dose)
        for charge, T, P in zip(row, row_T, row_P, strict=True):
            corrected.append(abs(charge) * k_TP(T, P) * polarity * recombination * K_ELEC)
    return np.array(doses), np.array(corrected).reshape(record.charge_nC.shape)


def _timed(function, record: Record) -> tuple[float, tuple[np.ndarray, np.ndarray]]:
    started = time.perf_counter()
    result = function(record)
    return time.perf_counter() - started, result


def main(argv: list[str] | None = None) -> int:
    args = report.parser(__doc__.splitlines()[0]).parse_args(argv)
    sessions = SMOKE_SESSIONS if args.smoke else FULL_SESSIONS
    readings = sessions * READINGS_PER_SESSION
    out = report.Report(
        f"reanalysis: every correction for {readings} readings ({sessions} sessions)", args.smoke
    )
    record = make_record(sessions)
    vector_runs = [_timed(vectorised, record) for _ in range(3)]
    vector_s = report.median([seconds for seconds, _ in vector_runs])
    loop_s, (loop_dose, loop_readings) = _timed(looped, record)
    vector_dose, vector_readings = vector_runs[0][1]
    disagreement = max(
        float(np.max(np.abs(vector_dose / loop_dose - 1.0))),
        float(np.max(np.abs(vector_readings / loop_readings - 1.0))),
    )
    out.note(f"vectorised runs: {', '.join(f'{s:.3f} s' for s, _ in vector_runs)} (median kept)")
    out.note(f"largest relative difference between the two: {disagreement:.1e}")
    if not disagreement <= AGREEMENT:
        raise SystemExit(f"the vectorised and looped results differ by {disagreement:.1e}")
    out.baseline("per-reading Python loop over the scalar functions", loop_s, "s")
    out.measured("vectorised (evaluate_sessions + corrected_readings_nC)", vector_s, "s")
    speedup = loop_s / vector_s
    out.ratio(speedup, "baseline / measured: times faster")
    scale = readings / 1_000_000
    out.target(
        f"vectorised under {TIME_TARGET_S * scale:g} s for {readings} readings",
        vector_s < TIME_TARGET_S * scale,
        f"{vector_s / (TIME_TARGET_S * scale):.0%} of the time allowed",
    )
    out.target(
        f"at least {SPEED_TARGET:g} times faster",
        speedup >= SPEED_TARGET,
        f"{speedup / SPEED_TARGET:.0%} of it",
    )
    return out.finish()


if __name__ == "__main__":
    sys.exit(main())
