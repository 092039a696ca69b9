"""Electron beams: z_ref from R50, the modality, chamber type and k_Q's source, and the wording."""

from __future__ import annotations

import pytest
from chargebook.corrections.beam_quality import (
    BeamQuality,
    check_quality,
    check_wording,
    quality_flags,
    quality_text,
    z_ref_cm,
)
from chargebook.corrections.conventions import Convention
from chargebook.corrections.errors import InputError
from chargebook.corrections.evaluate import MeasurementInputs, Uncertainties, evaluate
from chargebook.corrections.recombination import Beam

ELECTRON = BeamQuality("electron", 4.2, "plane-parallel", "TRS-398 (2000) table, chamber PP-1")


@pytest.mark.parametrize(
    ("R50_cm", "z_ref"),
    [
        # IAEA TRS-398 (2000), electron beams: z_ref = 0.6 R50 − 0.1 g cm⁻²; the same formula
        # is AAPM TG-51 (1999) d_ref = 0.6 R50 − 0.1 cm. Values are identities of that formula.
        (5.0, 2.9),  # TRS-398 and TG-51: 0.6 × 5.0 − 0.1
        (2.0, 1.1),  # TRS-398 and TG-51: 0.6 × 2.0 − 0.1
        (4.2, 2.42),  # TRS-398 and TG-51: 0.6 × 4.2 − 0.1
        (10.0, 5.9),  # TRS-398 and TG-51: 0.6 × 10 − 0.1
    ],
)
def test_z_ref_is_the_published_formula_of_both_codes(R50_cm: float, z_ref: float) -> None:
    assert z_ref_cm(R50_cm) == pytest.approx(z_ref, abs=1e-12)


@pytest.mark.parametrize("R50_cm", [0.5, 25.0, 42.0])  # 42: R50 typed in mm (common practice)
def test_an_R50_outside_the_plausible_range_is_refused_by_name(R50_cm: float) -> None:
    with pytest.raises(InputError) as caught:
        z_ref_cm(R50_cm)
    assert caught.value.field == "R50_cm"
    assert "1 to 20 cm" in str(caught.value)


@pytest.mark.parametrize(
    ("quality", "beam", "field"),
    [
        (BeamQuality("electron", None, "plane-parallel", "table"), Beam.PULSED, "R50_cm"),
        (BeamQuality("electron", 4.2, None, "table"), Beam.PULSED, "chamber_type"),
        (BeamQuality("electron", 4.2, "plane-parallel", None), Beam.PULSED, "k_Q_source"),
        (BeamQuality("electron", 4.2, "plane-parallel", "  "), Beam.PULSED, "k_Q_source"),
        (BeamQuality("electron", 4.2, "plane-parallel", "table"), Beam.CONTINUOUS, "beam"),
        (BeamQuality("electron", 4.2, "spherical", "table"), Beam.PULSED, "chamber_type"),
        (BeamQuality("proton", None, None, None), Beam.PULSED, "modality"),
        (BeamQuality("photon", 4.2, None, None), Beam.PULSED, "R50_cm"),
    ],
)
def test_what_an_electron_beam_needs_is_refused_by_name(
    quality: BeamQuality, beam: Beam, field: str
) -> None:
    with pytest.raises(InputError) as caught:
        check_quality(quality, beam)
    assert caught.value.field == field


def test_pulsed_scanned_electron_beam_and_plain_photon_beam_pass() -> None:
    given = BeamQuality(" Electron ", 4, "Plane-Parallel", "t")
    scanned = check_quality(given, Beam.PULSED_SCANNED)
    assert (scanned.modality, scanned.chamber_type, scanned.R50_cm) == (
        "electron",
        "plane-parallel",
        4.0,
    )
    assert check_quality(BeamQuality(), Beam.CONTINUOUS).modality == "photon"
    assert quality_text(BeamQuality()) is None


def test_an_electron_session_says_R50_and_z_ref() -> None:
    assert quality_text(check_quality(ELECTRON, Beam.PULSED)) == "R50 = 4.2 cm, z_ref = 2.42 cm"


@pytest.mark.parametrize(
    ("R50_cm", "convention", "flagged"),
    [
        # TRS-398 (2000) asks for plane-parallel chambers below R50 = 4 g cm⁻² (from memory).
        (3.9, Convention.TRS398, True),
        (4.0, Convention.TRS398, False),
        # TG-51 (1999) asks for them at R50 <= 2.6 cm (from memory).
        (2.5, Convention.TG51, True),
        (3.9, Convention.TG51, False),
    ],
)
def test_a_cylindrical_chamber_in_a_low_energy_electron_beam_is_flagged(
    R50_cm: float, convention: Convention, flagged: bool
) -> None:
    cylindrical = BeamQuality("electron", R50_cm, "cylindrical", "own determination")
    flags = quality_flags(cylindrical, convention)
    assert bool(flags) is flagged
    if flagged:
        assert "plane-parallel chamber" in flags[0].message
        assert f"R50 = {R50_cm:g} cm" in flags[0].message
    plane_parallel = BeamQuality("electron", R50_cm, "plane-parallel", "own determination")
    assert quality_flags(plane_parallel, convention) == []


@pytest.mark.parametrize(
    "text", ["6 MV photons, TPR20,10 0.67", "%dd(10)x 71.2", "10 MV FFF", "TPR 20,10 = 0.668"]
)
def test_photon_wording_is_refused_in_an_electron_session(text: str) -> None:
    with pytest.raises(InputError) as caught:
        check_wording("beam_quality", text, "electron")
    assert caught.value.field == "beam_quality"
    assert "electron session" in str(caught.value)
    check_wording("beam_quality", text, "photon")  # a photon session keeps its own words


def test_electron_wording_passes() -> None:
    check_wording("beam", "9 MeV electrons", "electron")
    check_wording("beam_quality", "R50 measured 2026-03-01", "electron")


def test_evaluate_carries_the_beam_quality_and_k_Q_source_into_the_results() -> None:
    inputs = MeasurementInputs(
        routine_nC=(10.0, 10.01),
        k_Q=0.918,
        uncertainties=Uncertainties(u_k_Q_pct=1.4),
        quality=ELECTRON,
    )
    result = evaluate(inputs).to_dict()
    (k_Q_line,) = [line for line in result["budget"] if line["u_rel_pct"] == 1.4]
    assert k_Q_line["source"] == "Type B: TRS-398 (2000) table, chamber PP-1"
    assert result["modality"] == "electron"
    assert result["R50_cm"] == 4.2
    assert result["z_ref_cm"] == pytest.approx(2.42)
    assert result["beam_quality_text"] == "R50 = 4.2 cm, z_ref = 2.42 cm"
    assert "TRS-398 (2000) table, chamber PP-1" in result["factor_sources"]["k_Q"]
    photon = evaluate(MeasurementInputs(routine_nC=(10.0, 10.01))).to_dict()
    assert (photon["modality"], photon["z_ref_cm"], photon["beam_quality_text"]) == (
        "photon",
        None,
        None,
    )


def test_evaluate_refuses_an_electron_beam_without_k_Q_source() -> None:
    quality = BeamQuality("electron", 4.2, "plane-parallel", None)
    with pytest.raises(InputError, match="k_Q_source"):
        evaluate(MeasurementInputs(routine_nC=(10.0,), quality=quality))


def test_evaluate_flags_a_cylindrical_chamber_below_4_cm_under_trs398() -> None:
    quality = BeamQuality("electron", 3.0, "cylindrical", "own determination")
    flags = evaluate(MeasurementInputs(routine_nC=(10.0, 10.01), quality=quality)).flags
    assert "cylindrical_chamber_low_R50" in {flag.code for flag in flags}
