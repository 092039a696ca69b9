"""The beam's modality and, for electron beams, R50 and the reference depth z_ref.

Photon and electron beams are measured with the same charge corrections (k_TP, k_h, k_pol, k_s,
k_elec) and the same dose formula D_w = M N_D,w k_Q; what differs is how the beam quality is
specified and where the chamber sits. For an electron beam both codes of practice (IAEA TRS-398
(2000), AAPM TG-51 (1999)) specify the quality by R50, the depth of the 50 % dose in water, in
cm (g cm⁻²), and measure at the reference depth z_ref = 0.6 R50 − 0.1 cm (docs/physics.md,
section 11). k_Q for the chamber at that R50 is the user's, entered with its source
(``k_Q_source``): it is required for an electron beam.

The modalities are an enum so that others (protons, kilovoltage x-rays) can be added; only
photon and electron are handled today. Nothing here reads a file or a clock.
"""

from __future__ import annotations

import enum
import re
from dataclasses import dataclass, replace

from chargebook.corrections.conventions import Convention
from chargebook.corrections.errors import Flag, InputError, parse_choice
from chargebook.corrections.limits import R50_CM
from chargebook.corrections.recombination import Beam


class Modality(enum.StrEnum):
    """The kind of radiation the beam delivers."""

    PHOTON = "photon"
    ELECTRON = "electron"


class ChamberType(enum.StrEnum):
    """The ionization chamber's geometry."""

    CYLINDRICAL = "cylindrical"
    PLANE_PARALLEL = "plane-parallel"


#: Below this R50 (cm) the code of practice asks for a plane-parallel chamber (from memory:
#: TRS-398 (2000) requires plane-parallel chambers for R50 < 4 g cm⁻²; TG-51 (1999) for
#: R50 <= 2.6 cm, 6 MeV or less).
PLANE_PARALLEL_BELOW_R50_CM = {Convention.TRS398: 4.0, Convention.TG51: 2.6}
#: Beam types an electron beam from a linac can have (its recombination method).
ELECTRON_BEAMS = (Beam.PULSED, Beam.PULSED_SCANNED)
MAX_SOURCE_TEXT = 200

#: Wording that names a photon beam quality or a photon beam; refused in an electron session's
#: beam name and beam quality text (an electron beam is specified by R50, its energy in MeV).
PHOTON_WORDING = re.compile(
    r"TPR\s*20|%\s*dd|dd\s*\(\s*10|photon|\d\s*MV\b|\bFFF\b", flags=re.IGNORECASE
)


@dataclass(frozen=True)
class BeamQuality:
    """The beam's modality, R50 in cm (electrons), the chamber's type and k_Q's source.

    As given: ``check_quality`` returns the checked copy ``evaluate`` uses.
    """

    modality: str = Modality.PHOTON
    R50_cm: float | None = None
    chamber_type: str | None = None
    k_Q_source: str | None = None


def z_ref_cm(R50_cm: float) -> float:
    """Return the reference depth in water z_ref = 0.6 R50 − 0.1 cm, in cm (TRS-398, TG-51).

    R50 in cm must lie in ``R50_CM``; InputError naming ``R50_cm`` otherwise.
    """
    R50 = float(R50_CM.check("R50_cm", R50_cm))
    return 0.6 * R50 - 0.1


def parse_modality(value: object) -> Modality:
    """Return the Modality named by ``value``; InputError naming ``modality`` otherwise."""
    return parse_choice(Modality, "modality", value, "modality")


def parse_chamber_type(value: object) -> ChamberType:
    """Return the ChamberType named by ``value``; InputError naming ``chamber_type`` otherwise."""
    return parse_choice(ChamberType, "chamber_type", value, "chamber type")


def _source(value: object) -> str | None:
    if value is None:
        return None
    allowed = f"a text of 1 to {MAX_SOURCE_TEXT} characters"
    if not isinstance(value, str) or not value.strip() or len(value) > MAX_SOURCE_TEXT:
        raise InputError("k_Q_source", value, allowed, "is not a usable source text")
    return value.strip()


def check_quality(quality: BeamQuality, beam: Beam) -> BeamQuality:
    """Return ``quality`` checked and normalised for a beam of type ``beam``.

    An electron beam needs R50 (cm), the chamber type and k_Q's source, and a pulsed or
    pulsed-scanned beam type; a photon beam takes no R50. Each refusal is an InputError naming
    the field (``R50_cm``, ``chamber_type``, ``k_Q_source``, ``beam``).
    """
    modality = parse_modality(quality.modality)
    chamber = None if quality.chamber_type is None else parse_chamber_type(quality.chamber_type)
    source = _source(quality.k_Q_source)
    R50 = quality.R50_cm
    if modality is Modality.PHOTON:
        if R50 is not None:
            raise InputError(
                "R50_cm", R50, "no R50 for a photon beam", "is given for a photon beam"
            )
    else:
        if R50 is None:
            raise InputError("R50_cm", None, f"R50 in cm, {R50_CM.text()}", "is missing")
        R50 = float(R50_CM.check("R50_cm", R50))
        if chamber is None:
            allowed = ", ".join(t.value for t in ChamberType)
            raise InputError("chamber_type", None, allowed, "is missing for an electron beam")
        if source is None:
            raise InputError(
                "k_Q_source",
                None,
                "the source of k_Q for this chamber at this R50 (a code of practice table or "
                "the user's own determination)",
                "is missing for an electron beam",
            )
        if beam not in ELECTRON_BEAMS:
            allowed = " or ".join(b.value for b in ELECTRON_BEAMS)
            raise InputError("beam", beam.value, allowed, "is not a beam type of an electron beam")
    return replace(
        quality,
        modality=modality.value,
        R50_cm=R50,
        chamber_type=None if chamber is None else chamber.value,
        k_Q_source=source,
    )


def check_wording(field: str, text: str | None, modality: object) -> None:
    """Raise InputError naming ``field`` when an electron beam's text names a photon quality.

    ``text`` describes the beam or its quality ("6 MV photons, TPR20,10 0.67" is refused for an
    electron beam: its quality is R50). Photon beams and None pass.
    """
    if text is None or parse_modality(modality) is not Modality.ELECTRON:
        return
    found = PHOTON_WORDING.search(text)
    if found is not None:
        raise InputError(
            field,
            text,
            "wording for an electron beam (its energy in MeV; its quality is R50)",
            f"names a photon beam ({found.group(0)!r}) in an electron session",
        )


def quality_text(quality: BeamQuality) -> str | None:
    """Return "R50 = 4.2 cm, z_ref = 2.42 cm" for a checked electron beam; None for photons."""
    if quality.modality != Modality.ELECTRON or quality.R50_cm is None:
        return None
    return f"R50 = {quality.R50_cm:g} cm, z_ref = {z_ref_cm(quality.R50_cm):.2f} cm"


def quality_flags(quality: BeamQuality, convention: Convention) -> list[Flag]:
    """Return the flag for a cylindrical chamber in an electron beam below the protocol's R50."""
    if quality.modality != Modality.ELECTRON or quality.R50_cm is None:
        return []
    below = PLANE_PARALLEL_BELOW_R50_CM[convention]
    if quality.chamber_type != ChamberType.CYLINDRICAL or quality.R50_cm >= below:
        return []
    return [
        Flag(
            "cylindrical_chamber_low_R50",
            f"A cylindrical chamber is used in an electron beam with R50 = "
            f"{quality.R50_cm:g} cm; below R50 = {below:g} cm the code of practice asks for a "
            "plane-parallel chamber. Measure with a plane-parallel chamber, or record why this "
            "one was used and check that k_Q covers it.",
        )
    ]


def quality_dict(quality: BeamQuality) -> dict[str, object]:
    """Return the beam quality's result keys: modality, R50_cm, z_ref_cm (cm), chamber_type,
    k_Q_source and beam_quality_text (None where not given)."""
    electron = quality.modality == Modality.ELECTRON and quality.R50_cm is not None
    return {
        "modality": str(quality.modality),
        "R50_cm": quality.R50_cm,
        "z_ref_cm": z_ref_cm(quality.R50_cm) if electron else None,
        "chamber_type": quality.chamber_type,
        "k_Q_source": quality.k_Q_source,
        "beam_quality_text": quality_text(quality),
    }
