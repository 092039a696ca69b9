"""Worksheets are read strictly: every shipped example loads, every mistake is named."""

from __future__ import annotations

import datetime
import json
from pathlib import Path

import chargebook.acquire
import pytest
from chargebook.acquire.session.worksheet import (
    load_worksheet,
    parse_worksheet,
    read_worksheet,
    worksheet_key,
)
from chargebook.corrections.errors import InputError

EXAMPLES = Path(chargebook.acquire.__file__).parent / "examples"

MINIMAL = """
convention = "trs398"
beam = "pulsed"
[readings]
routine_nC = [14.7, 14.71, 14.69]
"""


def write(tmp_path: Path, text: str, name: str = "sheet.toml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_the_six_mv_example_loads_every_section() -> None:
    worksheet = read_worksheet(EXAMPLES / "demo-la1-6mv.toml")
    inputs = worksheet.inputs
    assert inputs.convention == "trs398"
    assert inputs.routine_nC[0] == 14.747
    assert inputs.reduced_bias_V == 100.0
    assert inputs.tolerance_pct == "annual"
    assert inputs.uncertainties.u_N_Dw_pct_k2 == 1.1
    assert worksheet.session["machine"] == "DEMO-LA1"
    assert worksheet.session["date"] == "2026-03-02"  # a TOML date, kept as text


def test_conversions_are_recorded() -> None:
    inputs = load_worksheet(EXAMPLES / "demo-la2-10fff.toml")
    texts = [c.text() for c in inputs.conversions]
    # 1 hPa = 0.1 kPa; 1 Gy/C = 1e-9 Gy/nC (SI).
    assert texts == ["pressure 1018.5 hPa = 101.85 kPa", "N_D,w 5.41e+07 Gy/C = 0.0541 Gy/nC"]
    assert inputs.pressure_kPa == pytest.approx(101.85)
    assert inputs.N_Dw_Gy_per_nC == pytest.approx(0.0541)


def test_json_worksheet_with_mmHg() -> None:
    inputs = load_worksheet(EXAMPLES / "demo-co1-co60.json")
    assert inputs.beam == "continuous"
    assert inputs.pressure_kPa == pytest.approx(755.0 * 0.133322387)  # conventional mmHg


def test_cGy_per_nC_is_converted(tmp_path: Path) -> None:
    path = write(tmp_path, MINIMAL + "[calibration]\nN_Dw_cGy_per_nC = 5.38\n")
    inputs = load_worksheet(path)
    assert inputs.N_Dw_Gy_per_nC == pytest.approx(0.0538)
    assert inputs.conversions[0].text() == "N_D,w 5.38 cGy/nC = 0.0538 Gy/nC"


def test_minimal_worksheet_leaves_the_rest_unknown(tmp_path: Path) -> None:
    inputs = load_worksheet(write(tmp_path, MINIMAL))
    assert inputs.temperature_C is None
    assert inputs.opposite_nC == ()
    assert inputs.k_elec is None


def test_thresholds_section(tmp_path: Path) -> None:
    text = MINIMAL + "[thresholds]\nrelative_sd_pct = 0.1\ncharge_sign_for_positive_bias = 1\n"
    inputs = load_worksheet(write(tmp_path, text))
    assert inputs.thresholds.relative_sd_pct == 0.1
    assert inputs.thresholds.charge_sign_for_positive_bias == 1


@pytest.mark.parametrize(
    ("extra", "field", "words"),
    [
        ("[environment]\ntemperature = 21.0\n", "environment.temperature", "not a known key"),
        ("[environmnet]\ntemperature_C = 21.0\n", "environmnet", "not a known key"),
        ("[environment]\ntemperature_C = '21.0'\n", "environment.temperature_C", "wrong type"),
        ("[environment]\ntemperature_C = true\n", "environment.temperature_C", "wrong type"),
        (
            "[environment]\npressure_kPa = 101.0\npressure_hPa = 1010.0\n",
            "environment.pressure_hPa",
            "together with pressure_kPa",
        ),
        ("[environment]\npressure_mmHg = 7600\n", "pressure_mmHg", "mmHg"),
        ("[calibration]\nN_Dw_Gy_per_C = -5.4e7\n", "N_Dw_Gy_per_C", "Gy/C"),
        ("[readings_extra]\nx = 1\n", "readings_extra", "not a known key"),
        ("[thresholds]\nk_s_max = 0.9\n", "thresholds.k_s_max", "above 1"),
        # TOML spells NaN and infinity; a NaN limit would never flag anything.
        ("[thresholds]\nrelative_sd_pct = nan\n", "thresholds.relative_sd_pct", "finite"),
        (
            "[thresholds]\ndrift_pct_per_reading = inf\n",
            "thresholds.drift_pct_per_reading",
            "finite",
        ),
    ],
)
def test_mistakes_are_named(tmp_path: Path, extra: str, field: str, words: str) -> None:
    with pytest.raises(InputError) as caught:
        load_worksheet(write(tmp_path, MINIMAL + extra))
    assert caught.value.field == field
    assert words in str(caught.value)


@pytest.mark.parametrize(
    ("text", "field", "words"),
    [
        ('convention = "trs398"\n[readings]\nroutine_nC = [1.0]\n', "beam", "is missing"),
        ('beam = "pulsed"\nconvention = "trs398"\n', "readings.routine_nC", "is missing"),
        (
            'beam = "pulsed"\nconvention = "trs398"\n[readings]\nroutine_nC = []\n',
            "readings.routine_nC",
            "empty reading set",
        ),
        (
            'beam = "pulsed"\nconvention = "trs398"\n[readings]\nroutine_nC = [14.7, "14.8"]\n',
            "readings.routine_nC[1]",
            "not a number",
        ),
        ('beam = "pulsed"\nconvention = "trs398"\nreadings = 3\n', "readings", "not a table"),
    ],
)
def test_structure_errors_are_named(tmp_path: Path, text: str, field: str, words: str) -> None:
    with pytest.raises(InputError) as caught:
        load_worksheet(write(tmp_path, text))
    assert caught.value.field == field
    assert words in str(caught.value)


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="cannot be read"):
        load_worksheet(tmp_path / "nowhere.toml")


def test_toml_syntax_error(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="is not valid TOML"):
        load_worksheet(write(tmp_path, "convention = \n"))


def test_json_syntax_error(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="is not valid JSON"):
        load_worksheet(write(tmp_path, "{", "sheet.json"))


def test_json_must_hold_a_table(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="is not a table"):
        load_worksheet(write(tmp_path, json.dumps([1, 2]), "sheet.json"))


def test_unknown_file_type(tmp_path: Path) -> None:
    with pytest.raises(InputError, match=r"\.toml or \.json"):
        load_worksheet(write(tmp_path, MINIMAL, "sheet.txt"))


@pytest.mark.parametrize(
    ("field", "key"),
    [
        ("reduced_bias_V", "bias.reduced_V"),
        ("|routine_bias_V|", "bias.routine_V"),
        ("voltage ratio routine_bias_V/reduced_bias_V", "bias.routine_V"),
        ("temperature_C", "environment.temperature_C"),
        ("opposite_nC[2]", "readings.opposite_nC"),
        ("uncertainties.u_k_Q_pct", "calibration.u_k_Q_pct"),
        ("uncertainties.u_pressure_kPa", "uncertainty.u_pressure_kPa"),
        ("something else", None),
    ],
)
def test_evaluate_fields_lead_back_to_worksheet_keys(field: str, key: str | None) -> None:
    assert worksheet_key(field) == key


def test_issue_12_keys_reach_the_inputs(tmp_path: Path) -> None:
    text = MINIMAL.replace("[readings]\n", "[readings]\nreturn_nC = [14.72, 14.70, 14.71]\n")
    text += (
        "[calibration]\nu_N_Dw_pct_k2 = 1.2\nk_N_Dw = 2.4\n"
        "[uncertainty]\ncoverage_probability = 0.99\nu_reference_conditions_pct = 0.3\n"
        "u_electrometer_resolution_pct = 0.02\n"
        '[thresholds]\nrecombination_off_table = "boag"\nbias_resolution_V = 1\n'
        "outlier_floor_pct = 0.1\nreturn_check_pct = 0.3\n"
    )
    inputs = load_worksheet(write(tmp_path, text))
    assert inputs.return_nC == (14.72, 14.70, 14.71)
    u = inputs.uncertainties
    assert (u.u_N_Dw_pct_k2, u.k_N_Dw, u.coverage_probability) == (1.2, 2.4, 0.99)
    assert (u.u_reference_conditions_pct, u.u_electrometer_resolution_pct) == (0.3, 0.02)
    t = inputs.thresholds
    assert (t.recombination_off_table, t.bias_resolution_V) == ("boag", 1.0)
    assert (t.outlier_floor_pct, t.return_check_pct) == (0.1, 0.3)


def test_the_return_check_may_have_its_own_environment_table(tmp_path: Path) -> None:
    text = MINIMAL.replace("[readings]\n", "[readings]\nreturn_nC = [14.72, 14.70, 14.71]\n")
    text += "[environment.return]\ntemperature_C = 22.3\npressure_kPa = 100.5\n"
    air = load_worksheet(write(tmp_path, text)).set_environments["return"]
    assert (air.temperature_C, air.pressure_kPa) == (22.3, 100.5)
    assert air.source == "worksheet [environment.return]"


def test_an_unknown_off_table_choice_is_named(tmp_path: Path) -> None:
    text = MINIMAL + '[thresholds]\nrecombination_off_table = "nearest"\n'
    with pytest.raises(InputError) as caught:
        load_worksheet(write(tmp_path, text))
    assert caught.value.field == "thresholds.recombination_off_table"
    assert "refuse or boag" in str(caught.value)


PER_SET = """
convention = "trs398"
beam = "pulsed"
[environment]
temperature_C = 22.2
pressure_kPa = 100.45
[environment.routine]
temperature_C = 21.8
pressure_kPa = 100.6
[environment.opposite]
temperature_C = 22.2
pressure_hPa = 1006.0
[bias]
routine_V = 300
reduced_V = 100
[readings]
routine_nC = [14.747, 14.751, 14.749]
opposite_nC = [-14.775, -14.777, -14.774]
reduced_nC = [14.570, 14.567, 14.569]
"""


def test_a_set_may_have_its_own_environment_table(tmp_path: Path) -> None:
    inputs = load_worksheet(write(tmp_path, PER_SET))
    routine, opposite = inputs.set_environments["routine"], inputs.set_environments["opposite"]
    assert (routine.temperature_C, routine.pressure_kPa) == (21.8, 100.6)
    assert opposite.pressure_kPa == pytest.approx(100.6, rel=1e-15)  # 1006 hPa, converted once
    assert "reduced" not in inputs.set_environments  # it uses [environment]
    assert any(c.unit == "hPa" for c in inputs.conversions)


@pytest.mark.parametrize(
    ("table", "field"),
    [
        ("[environment.opposite]\ntemperature_C = 22.0\nhumidity_pct = 40", "humidity_pct"),
        ("[environment.opposite]\npressure_kPa = 100.6", "temperature_C"),
        ("[environment.opposite]\ntemperature_C = 22.0", "pressure_kPa"),
    ],
)
def test_a_bad_set_environment_table_names_its_key(tmp_path: Path, table: str, field: str) -> None:
    text = MINIMAL + "\n" + table + "\n"
    with pytest.raises(InputError, match=rf"environment\.opposite\.{field}"):
        read_worksheet(write(tmp_path, text))


def test_an_out_of_range_set_environment_points_at_the_worksheet_key() -> None:
    assert worksheet_key("set_environments.reduced.temperature_C") == (
        "environment.reduced.temperature_C"
    )


def test_carried_factors_without_a_session_date_are_checked_against_today() -> None:
    document = {
        "convention": "trs398",
        "beam": "pulsed",
        "readings": {"routine_nC": [14.7, 14.71]},
        "carried": {"k_pol": {"value": 1.001, "source": "report", "date": "2026-05-01"}},
    }
    later = parse_worksheet(document, today=datetime.date(2026, 6, 1)).inputs
    assert later.measured_on == "2026-06-01"
    assert later.carried["k_pol"].value == 1.001
    assert later.not_measured == ("k_s",)  # no reduced-bias readings and no carried k_s
    with pytest.raises(InputError, match=r"carried\.k_pol\.date = '2026-05-01' is in the future"):
        parse_worksheet(document, today=datetime.date(2026, 4, 1))
    assert worksheet_key("carried.k_pol.date") == "carried.k_pol.date"
    with pytest.raises(InputError, match=r"carried\.k_elec .*is not a known key"):
        parse_worksheet({**document, "carried": {"k_elec": {}}})


@pytest.mark.parametrize(
    ("name", "text"),
    [
        (
            "sheet.toml",
            MINIMAL.replace("[14.7, 14.71, 14.69]", "[14.747, 14.751, 14,749, 14.752]"),
        ),
        (
            "sheet.json",
            json.dumps(
                {
                    "convention": "trs398",
                    "beam": "pulsed",
                    "readings": {"routine_nC": [14.7], "opposite_nC": [-14.775, -14, 777]},
                }
            ),
        ),
    ],
)
def test_a_comma_inside_a_charge_is_refused_naming_the_integers(
    tmp_path: Path, name: str, text: str
) -> None:
    # `14,749` is valid TOML and JSON (the integers 14 and 749): a typing slip, not two readings.
    with pytest.raises(InputError) as raised:
        load_worksheet(write(tmp_path, text, name))
    message = str(raised.value)
    assert raised.value.field.startswith("readings.")
    assert "a comma inside a number?" in message
    if name == "sheet.toml":
        assert message.startswith("readings.routine_nC = ")
        assert "holds 14 and 749 among decimal readings" in message
        assert "Write 14.749" in message
    else:
        assert "readings.opposite_nC" in message and "holds -14 and 777" in message


def test_whole_number_charges_alone_are_accepted(tmp_path: Path) -> None:
    inputs = load_worksheet(write(tmp_path, MINIMAL.replace("[14.7, 14.71, 14.69]", "[15, 16]")))
    assert inputs.routine_nC == (15.0, 16.0)
