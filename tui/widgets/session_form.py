"""The session details form: metadata and calibration data, each entry checked as typed.

The keys are those of ``chargebook.acquire.session.metadata`` (the daemon checks them again on
``session.start``); ranges and wording come from ``chargebook.corrections``.
"""

from __future__ import annotations

import datetime
from collections.abc import Mapping
from typing import Any

from chargebook.corrections import dose, limits, units
from chargebook.tui import checks
from chargebook.tui.widgets.fields import ChoiceField, Field, choice, conversion_note
from textual import on
from textual.app import ComposeResult
from textual.containers import Vertical
from textual.widgets import Input, Select, Static

#: (key, label) of the text entries, grouped under a heading.
TEXT_SECTIONS: tuple[tuple[str, tuple[tuple[str, str], ...]], ...] = (
    (
        "Beam",
        (
            ("operator", "Operator"),
            ("treatment_machine", "Treatment machine"),
            ("beam", "Beam (e.g. 6 MV)"),
        ),
    ),
    (
        "Chamber and electrometer",
        (
            ("chamber_model", "Chamber model"),
            ("chamber_serial", "Chamber serial"),
            ("electrometer_model", "Electrometer model"),
            ("electrometer_serial", "Electrometer serial"),
        ),
    ),
)

CONVENTIONS = (("IAEA TRS-398", "trs398"), ("AAPM TG-51", "tg51"))
BEAM_TYPES = (
    ("pulsed", "pulsed"),
    ("pulsed-scanned", "pulsed-scanned"),
    ("continuous", "continuous"),
)
N_DW_UNITS = (("Gy/nC", "Gy/nC"), ("Gy/C", "Gy/C"), ("cGy/nC", "cGy/nC"))
MODALITIES = (("photon", "photon"), ("electron", "electron"))
#: "" is not sent: the chamber's type is only needed for an electron beam.
CHAMBER_TYPES = (
    ("not stated", ""),
    ("cylindrical", "cylindrical"),
    ("plane-parallel", "plane-parallel"),
)

#: (key, label, check, required) of the number entries of the calibration section.
NUMBER_FIELDS: tuple[tuple[str, str, checks.Check, bool], ...] = (
    (
        "u_N_Dw_pct_k2",
        "u(N_D,w) % k=2",
        checks.in_range("u_N_Dw_pct_k2", limits.UNCERTAINTY_PCT),
        False,
    ),
    ("k_Q", "k_Q", checks.in_range("k_Q", limits.K_Q), True),
    ("u_k_Q_pct", "u(k_Q) %", checks.in_range("u_k_Q_pct", limits.UNCERTAINTY_PCT), False),
    ("k_elec", "k_elec (empty: 1)", checks.in_range("k_elec", limits.K_ELEC), False),
    (
        "expected_cGy_per_MU",
        "Expected cGy/MU",
        checks.in_range("expected_cGy_per_MU", limits.EXPECTED_CGY_PER_MU),
        True,
    ),
    (
        "k_N_Dw",
        "k of u(N_D,w) (empty: 2)",
        checks.in_range("k_N_Dw", limits.CERTIFICATE_K),
        False,
    ),
    *(
        (key, label, checks.in_range(key, limits.UNCERTAINTY_PCT), False)
        for key, label in (
            ("u_reference_conditions_pct", "u ref. conditions %"),
            ("u_long_term_stability_pct", "u long-term stability %"),
            ("u_beam_monitor_pct", "u beam monitor %"),
            ("u_electrometer_resolution_pct", "u electrometer resol. %"),
        )
    ),
)


#: (key, label) of the optional text entries about the calibration and the session.
OPTIONAL_TEXT: tuple[tuple[str, str], ...] = (
    ("calibration_date", "Calibrated on"),
    ("certificate", "Certificate"),
    ("beam_quality", "Beam quality"),
    ("notes", "Notes"),
)
#: Entries whose text is sent as a number (or, for the tolerance, a TG-142 name).
NUMBER_KEYS = frozenset({"N_Dw", "tolerance_pct", "R50_cm", *(entry[0] for entry in NUMBER_FIELDS)})


def check_date(value: str) -> object:
    """Check a date typed as YYYY-MM-DD."""
    try:
        return datetime.date.fromisoformat(value.strip())
    except ValueError:
        raise ValueError(
            f"calibration_date = {value.strip()!r} is not a date (allowed: YYYY-MM-DD)"
        ) from None


OPTIONAL_CHECKS: dict[str, checks.Check] = {"calibration_date": checks.optional(check_date)}


def check_tolerance(value: str) -> object:
    """Check a tolerance typed as a number in % or as daily, monthly or annual (TG-142)."""
    return dose.tolerance_pct(checks.as_typed(value))


def _shown(value: Any) -> str:
    if value is None:
        return ""
    return f"{value:g}" if isinstance(value, int | float) else str(value)


class SessionForm(Vertical):
    """Metadata, convention, beam type and calibration entries of a new session."""

    def __init__(self, defaults: Mapping[str, Any] | None = None) -> None:
        super().__init__(id="session-form")
        self.defaults = dict(defaults or {})
        self.N_Dw_unit = str(self.defaults.get("N_Dw_unit") or "Gy/nC")

    def compose(self) -> ComposeResult:
        value = self.defaults.get
        for heading, entries in TEXT_SECTIONS:
            yield Static(heading, classes="section-title", markup=False)
            for key, label in entries:
                yield Field(label, key, _shown(value(key)), check=checks.required_text(key))
        yield ChoiceField("Beam type", "beam_type", BEAM_TYPES, value("beam_type") or "pulsed")
        yield ChoiceField("Convention", "convention", CONVENTIONS, value("convention") or "trs398")
        yield Static("Calibration and expected output", classes="section-title", markup=False)
        yield Field(
            "N_D,w",
            "N_Dw",
            _shown(value("N_Dw")),
            check=checks.calibration_in(lambda: self.N_Dw_unit),
            suffix=choice("N_Dw_unit", N_DW_UNITS, self.N_Dw_unit),
        )
        for key, label, check, required in NUMBER_FIELDS:
            yield Field(
                label, key, _shown(value(key)), check=check if required else checks.optional(check)
            )
        yield Field(
            "Tolerance % or TG-142",
            "tolerance_pct",
            _shown(value("tolerance_pct")),
            check=checks.optional(check_tolerance),
            placeholder="daily, monthly, annual; empty: monthly",
        )
        for key, label in OPTIONAL_TEXT:
            check = OPTIONAL_CHECKS.get(key)
            yield Field(f"{label} (optional)", key, _shown(value(key)), check=check)
        yield from self._electron_entries()

    def _electron_entries(self) -> ComposeResult:
        """Yield the entries an electron beam needs: modality, R50, chamber type, k_Q source."""
        value = self.defaults.get
        yield Static(
            "Electron beam (R50, chamber, k_Q source)", classes="section-title", markup=False
        )
        yield ChoiceField("Modality", "modality", MODALITIES, value("modality") or "photon")
        yield Field(
            "R50 cm (electrons)",
            "R50_cm",
            _shown(value("R50_cm")),
            check=checks.optional(checks.in_range("R50_cm", limits.R50_CM)),
        )
        yield ChoiceField(
            "Chamber type", "chamber_type", CHAMBER_TYPES, value("chamber_type") or ""
        )
        yield Field("k_Q source", "k_Q_source", _shown(value("k_Q_source")))

    @on(Select.Changed, "#choice-N_Dw_unit")
    def unit_changed(self, event: Select.Changed) -> None:
        self.N_Dw_unit = str(event.value)
        field = self.query_one("#field-N_Dw", Field)
        if field.value or field.touched:  # a unit set as the form opens is no cause to complain
            field.recheck()
        self._show_conversion()

    @on(Input.Changed, "#input-N_Dw")
    def calibration_changed(self) -> None:
        self._show_conversion()

    def on_mount(self) -> None:
        self._show_conversion()

    def _show_conversion(self) -> None:
        """Show N_D,w in Gy/nC under an entry typed in Gy/C or cGy/nC, as the daemon converts."""
        field = self.query_one("#field-N_Dw", Field)
        field.note = conversion_note(
            field.value, self.N_Dw_unit, units.N_Dw_Gy_per_nC, "Gy/nC", digits=6
        )

    def is_valid(self) -> bool:
        """Return True if every entry passes its check (nothing is shown)."""
        return all(field.is_valid() for field in self.query(Field))

    def metadata(self) -> dict[str, Any] | None:
        """Return the ``session.start`` metadata, or None if an entry is wrong (each says why)."""
        fields = list(self.query(Field))
        if not all([field.recheck() for field in fields]):
            return None
        metadata: dict[str, Any] = {
            choice_field.field_name: choice_field.value
            for choice_field in self.query(ChoiceField)
            if choice_field.value
        }
        metadata["N_Dw_unit"] = self.N_Dw_unit
        for field in fields:
            name = field.field_name
            if field.value:
                metadata[name] = (
                    checks.as_typed(field.value) if name in NUMBER_KEYS else field.value
                )
        return metadata

    def fill(self, values: Mapping[str, Any]) -> None:
        """Put ``values`` (metadata keys, as the daemon gives them from the registers) in their
        entries and choices; keys with no entry here are left out."""
        for field in self.query(Field):
            if field.field_name in values:
                field.input.value = _shown(values[field.field_name])
        for choice_field in self.query(ChoiceField):
            if values.get(choice_field.field_name) is not None:
                choice_field.query_one(Select).value = str(values[choice_field.field_name])
        if values.get("N_Dw_unit") is not None:
            self.query_one("#choice-N_Dw_unit", Select).value = str(values["N_Dw_unit"])

    def show_refusal(self, field_name: str | None, message: str) -> bool:
        """Show the daemon's refusal under the entry it names; return False if none matches."""
        if not field_name:
            return False
        matches = self.query(f"#field-{field_name.split('[')[0]}")
        for field in matches:
            if isinstance(field, Field):
                field.show_problem(message)
                return True
        return False
