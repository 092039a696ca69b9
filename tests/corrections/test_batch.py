"""Batch re-analysis gives, session by session, what evaluate() gives."""

from __future__ import annotations

import numpy as np
import pytest
from chargebook.corrections.air_density import k_TP
from chargebook.corrections.batch import corrected_readings_nC, evaluate_sessions
from chargebook.corrections.errors import InputError
from chargebook.corrections.evaluate import evaluate

SESSIONS = 40
RNG = np.random.default_rng(2093)  # invented inputs, seeded
#: The session settings shared by every session of the batch (as in the conftest session).
SETTINGS = {
    "routine_bias_V": 300.0,
    "reduced_bias_V": 100.0,
    "N_Dw_Gy_per_nC": 0.0538,
    "k_Q": 0.992,
    "k_elec": 1.0,
}


def invented_sessions() -> dict[str, np.ndarray]:
    """Return NaN-padded sets for SESSIONS sessions, each with its own environment."""
    scale = RNG.uniform(0.98, 1.02, SESSIONS)[:, None]
    routine = scale * 14.75 * (1 + 3e-4 * RNG.standard_normal((SESSIONS, 5)))
    routine[::3, 4] = np.nan  # every third session took only four readings
    return {
        "routine": routine,
        "opposite": -scale * 14.776 * (1 + 3e-4 * RNG.standard_normal((SESSIONS, 3))),
        "reduced": scale * 14.569 * (1 + 3e-4 * RNG.standard_normal((SESSIONS, 3))),
        "temperature_C": RNG.uniform(18.0, 25.0, SESSIONS),
        "pressure_kPa": RNG.uniform(97.0, 104.0, SESSIONS),
    }


@pytest.mark.parametrize(
    ("convention", "beam"),
    [
        ("trs398", "pulsed"),
        ("trs398", "pulsed-scanned"),
        ("tg51", "pulsed"),
        ("tg51", "continuous"),
    ],
)
def test_each_session_matches_evaluate(session, convention: str, beam: str) -> None:
    data = invented_sessions()
    batch = evaluate_sessions(
        data["routine"],
        data["opposite"],
        data["reduced"],
        temperature_C=data["temperature_C"],
        pressure_kPa=data["pressure_kPa"],
        **SETTINGS,
        monitor_units=100.0,
        expected_cGy_per_MU=0.8,
        convention=convention,
        beam=beam,
    )
    for i in range(SESSIONS):
        routine = data["routine"][i]
        single = evaluate(
            session(
                routine_nC=tuple(routine[~np.isnan(routine)]),
                opposite_nC=tuple(data["opposite"][i]),
                reduced_nC=tuple(data["reduced"][i]),
                temperature_C=float(data["temperature_C"][i]),
                pressure_kPa=float(data["pressure_kPa"][i]),
                convention=convention,
                beam=beam,
            )
        )
        assert batch.count[i] == single.sets["routine"].count
        assert batch.k_TP[i] == pytest.approx(single.factors["k_TP"].value, rel=1e-15)
        assert batch.k_pol[i] == pytest.approx(single.factors["k_pol"].value, rel=1e-12)
        assert batch.k_s[i] == pytest.approx(single.factors["k_s"].value, rel=1e-12)
        assert batch.dose_Gy[i] == pytest.approx(single.dose_Gy, rel=1e-12)
        assert batch.deviation_pct[i] == pytest.approx(single.deviation_pct, rel=1e-9, abs=1e-12)
        assert batch.relative_sd_pct[i] == pytest.approx(
            single.sets["routine"].relative_sd_pct, rel=1e-9
        )


def test_readings_corrected_one_by_one() -> None:
    charge = np.array([-14.75, -14.76, -14.74])
    temperature = np.array([20.0, 21.0, 22.0])
    result = corrected_readings_nC(charge, temperature, 101.0, k_pol=1.001, k_s=1.006, k_elec=0.999)
    expected = [
        abs(q) * k_TP(t, 101.0) * 1.001 * 1.006 * 0.999
        for q, t in zip(charge, temperature, strict=True)
    ]
    assert result == pytest.approx(expected, rel=1e-14)


def test_an_empty_session_is_refused_by_row() -> None:
    routine = np.array([[14.7, 14.8], [np.nan, np.nan]])
    with pytest.raises(InputError) as caught:
        evaluate_sessions(
            routine,
            -routine,
            routine,
            temperature_C=20.0,
            pressure_kPa=101.0,
            **SETTINGS,
        )
    assert caught.value.field == "routine_nC[1]"


def test_an_out_of_range_temperature_is_refused_by_index() -> None:
    with pytest.raises(InputError, match=r"temperature_C\[1\] = 45"):
        corrected_readings_nC([14.7, 14.7], [20.0, 45.0], 101.0, k_pol=1.0, k_s=1.0, k_elec=1.0)


def sessions_with(**rows: list[list[float]]) -> dict[str, np.ndarray]:
    """Return two plain sessions (routine +, opposite −, reduced +) with some rows replaced."""
    data = {
        "routine_nC": [[14.75, 14.76, 14.74], [14.70, 14.71, 14.69]],
        "opposite_nC": [[-14.78, -14.77, -14.79], [-14.73, -14.72, -14.74]],
        "reduced_nC": [[14.57, 14.56, 14.58], [14.52, 14.51, 14.53]],
    }
    data.update(rows)
    return {key: np.array(value) for key, value in data.items()}


def refused_field(data: dict[str, np.ndarray], **changes: float) -> InputError:
    """Return the InputError evaluate_sessions raises for ``data`` at 20 °C, 101 kPa."""
    with pytest.raises(InputError) as caught:
        evaluate_sessions(
            data["routine_nC"],
            data["opposite_nC"],
            data["reduced_nC"],
            temperature_C=20.0,
            pressure_kPa=101.0,
            **{**SETTINGS, **changes},
        )
    return caught.value


@pytest.mark.parametrize(
    ("rows", "field", "words"),
    [
        # A near-zero reading of the wrong sign in a reduced-bias row: its mean would still give a
        # plausible-looking M1/M2 (about 1.5, k_s about 1.4) if the sign were not checked.
        (
            {"reduced_nC": [[14.57, 14.56, 14.58], [14.52, 14.51, -0.01]]},
            "reduced_nC[1,2]",
            "contradicts the bias of its set",
        ),
        (
            {"routine_nC": [[14.75, 14.76, 14.74], [14.70, -14.71, 14.69]]},
            "routine_nC[1,1]",
            "contradicts the bias of its set",
        ),
        (
            {"opposite_nC": [[-14.78, -14.77, -14.79], [14.73, 14.72, 14.74]]},
            "opposite_nC[1]",
            "opposite sign to the routine readings",
        ),
        (
            {"reduced_nC": [[-14.57, -14.56, -14.58], [14.52, 14.51, 14.53]]},
            "reduced_nC[0]",
            "same sign as the routine readings",
        ),
    ],
)
def test_signs_that_contradict_the_bias_are_refused_by_row(
    rows: dict, field: str, words: str
) -> None:
    # The same rule as evaluate(): one bias per set, the reduced bias keeps the routine
    # polarity and the opposite set reverses it.
    error = refused_field(sessions_with(**rows))
    assert error.field == field
    assert words in str(error)


def test_batch_bias_errors_use_the_batch_argument_names() -> None:
    assert refused_field(sessions_with(), reduced_bias_V=-100.0).field == "reduced_bias_V"
