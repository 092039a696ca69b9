"""A labelled entry box that checks what is typed and says in words what is wrong."""

from __future__ import annotations

from collections.abc import Callable, Sequence

from chargebook.tui.checks import Check, CheckValidator, as_typed
from textual.app import ComposeResult
from textual.containers import Horizontal, Vertical
from textual.reactive import reactive
from textual.widget import Widget
from textual.widgets import Input, Label, Select, Static


class Field(Vertical):
    """One entry: label, input box and, under it, the problem with the entry (if any).

    ``name`` is the parameter it fills (``temperature_C``); the field checks every keystroke with
    ``check``. A problem is shown once the operator has left the entry (or pressed Start), in
    words that name the entry by its label, and goes as soon as the entry is right; a refusal
    from the daemon is shown in the daemon's words.
    """

    problem: reactive[str] = reactive("")
    #: A line under the entry that is not a problem (e.g. "= 100.80 kPa", the value converted).
    note: reactive[str] = reactive("")

    def __init__(
        self,
        label: str,
        name: str,
        value: str = "",
        *,
        check: Check | None = None,
        placeholder: str = "",
        suffix: Widget | None = None,
    ) -> None:
        super().__init__(id=f"field-{name}", classes="field")
        self.label = label
        self.field_name = name
        self.initial_value = value
        self.check = check
        self.placeholder = placeholder
        self.suffix = suffix
        self.touched = False  # left by the operator, or checked by Start

    def compose(self) -> ComposeResult:
        with Horizontal(classes="field-row"):
            yield Label(self.label, classes="field-label")
            yield Input(
                self.initial_value,
                placeholder=self.placeholder,
                validators=[CheckValidator(self.check, self.label)] if self.check else [],
                id=f"input-{self.field_name}",
                compact=True,
                validate_on=["changed", "submitted"],
            )
            if self.suffix is not None:
                yield self.suffix
        yield Static("", classes="field-problem", markup=False)
        yield Static("", classes="field-note", markup=False)

    @property
    def input(self) -> Input:
        """Return the entry box."""
        return self.query_one(Input)

    @property
    def value(self) -> str:
        """Return the text as typed, without surrounding spaces."""
        return self.input.value.strip()

    def is_valid(self) -> bool:
        """Return True if the entry as typed passes its check (nothing is shown)."""
        result = self.input.validate(self.input.value)
        return result is None or result.is_valid

    def recheck(self) -> bool:
        """Check the entry now and show any problem (Start, or its unit changed); True if valid."""
        self.touched = True
        result = self.input.validate(self.input.value)
        self.problem = "" if result is None or result.is_valid else self._first(result)
        return not self.problem

    def show_problem(self, message: str) -> None:
        """Show a problem reported from elsewhere (the daemon's refusal) under the entry."""
        self.problem = message

    def on_input_changed(self, event: Input.Changed) -> None:
        result = event.validation_result
        if result is None or result.is_valid:
            self.problem = ""  # right now: the problem goes at once
        elif self.touched:
            self.problem = self._first(result)

    def on_descendant_focus(self) -> None:
        mark_focus(self, self.label, True)

    def on_descendant_blur(self) -> None:
        """The operator left the entry: from now on, say what is wrong with it."""
        mark_focus(self, self.label, False)
        if not self.touched:
            self.recheck()

    def watch_note(self, note: str) -> None:
        shown = self.query_one(".field-note", Static)
        shown.update(note)
        shown.display = bool(note)

    def watch_problem(self, problem: str) -> None:
        note = self.query_one(".field-problem", Static)
        note.update(f"!! {problem}" if problem else "")
        note.display = bool(problem)
        self.set_class(bool(problem), "-invalid")

    @staticmethod
    def _first(result) -> str:
        descriptions = result.failure_descriptions
        return descriptions[0] if descriptions else "not accepted"


#: Put before the label of the entry that has the focus, so it shows without colour.
FOCUS_MARK = "▸ "


def mark_focus(widget: Widget, label: str, focused: bool) -> None:
    """Show ``label`` with the focus mark in front of it while the entry has the focus."""
    widget.query_one(".field-label", Label).update(f"{FOCUS_MARK}{label}" if focused else label)


def conversion_note(
    typed: str,
    unit: str,
    convert: Callable[[object, str], float],
    to_unit: str,
    *,
    digits: int,
) -> str:
    """Return "= 100.800 kPa": the typed value converted as the daemon will (empty if the unit
    is already ``to_unit`` or the value is not accepted)."""
    if unit == to_unit or not typed:
        return ""
    try:
        converted = float(convert(as_typed(typed), unit))
    except ValueError:
        return ""
    return f"= {converted:.{digits}f} {to_unit} (converted from {typed} {unit})"


def choice(name: str, options: Sequence[tuple[str, str]], value: str) -> Select[str]:
    """Return a compact drop-down named ``choice-<name>`` with (label, value) options."""
    return Select(
        options,
        value=value,
        allow_blank=False,
        id=f"choice-{name}",
        compact=True,
        classes="choice",
    )


class ChoiceField(Horizontal):
    """A labelled drop-down (convention, beam type, unit): always holds one valid choice."""

    def __init__(self, label: str, name: str, options: Sequence[tuple[str, str]], value: str):
        super().__init__(id=f"field-{name}", classes="field-row choice-field")
        self.label = label
        self.field_name = name
        self.options = options
        self.initial_value = value

    def compose(self) -> ComposeResult:
        yield Label(self.label, classes="field-label")
        yield choice(self.field_name, self.options, self.initial_value)

    @property
    def value(self) -> str:
        """Return the chosen value."""
        return str(self.query_one(Select).value)

    def on_descendant_focus(self) -> None:
        mark_focus(self, self.label, True)

    def on_descendant_blur(self) -> None:
        mark_focus(self, self.label, False)
