"""A labelled entry box that checks what is typed and says in words what is wrong."""

from __future__ import annotations

from collections.abc import Sequence

from chargebook.tui.checks import Check, CheckValidator
from textual.app import ComposeResult
from textual.containers import Horizontal, Vertical
from textual.reactive import reactive
from textual.widget import Widget
from textual.widgets import Input, Label, Select, Static


class Field(Vertical):
    """One entry: label, input box and, under it, the problem with the entry (if any).

    ``name`` is the parameter it fills (``temperature_C``); the field checks every keystroke with
    ``check`` and shows the daemon's own message when the daemon refuses the value.
    """

    problem: reactive[str] = reactive("")

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

    def compose(self) -> ComposeResult:
        with Horizontal(classes="field-row"):
            yield Label(self.label, classes="field-label")
            yield Input(
                self.initial_value,
                placeholder=self.placeholder,
                validators=[CheckValidator(self.check)] if self.check else [],
                id=f"input-{self.field_name}",
                compact=True,
                validate_on=["changed", "submitted"],
            )
            if self.suffix is not None:
                yield self.suffix
        yield Static("", classes="field-problem", markup=False)

    @property
    def input(self) -> Input:
        """Return the entry box."""
        return self.query_one(Input)

    @property
    def value(self) -> str:
        """Return the text as typed, without surrounding spaces."""
        return self.input.value.strip()

    def recheck(self) -> bool:
        """Check the entry again (e.g. after its unit changed); return True if it is valid."""
        result = self.input.validate(self.input.value)
        self.problem = "" if result is None or result.is_valid else self._first(result)
        return not self.problem

    def show_problem(self, message: str) -> None:
        """Show a problem reported from elsewhere (the daemon's refusal) under the entry."""
        self.problem = message

    def on_input_changed(self, event: Input.Changed) -> None:
        event.stop()
        result = event.validation_result
        self.problem = "" if result is None or result.is_valid else self._first(result)

    def watch_problem(self, problem: str) -> None:
        note = self.query_one(".field-problem", Static)
        note.update(f"!! {problem}" if problem else "")
        note.display = bool(problem)
        self.set_class(bool(problem), "-invalid")

    @staticmethod
    def _first(result) -> str:
        descriptions = result.failure_descriptions
        return descriptions[0] if descriptions else "not accepted"


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
