"""The operator's actions on the measurement screen, declared once as data.

Each action has a key, a short label in plain English, and the daemon methods it may call. The
key bindings, the footer's key help and the buttons are all built from :data:`ACTIONS`, and an
action is enabled exactly when the daemon's snapshot lists one of its methods in ``allowed``.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

from chargebook.acquire.protocol import Method


@dataclass(frozen=True, slots=True)
class OperatorAction:
    """One thing the operator can do: its key, its label and the daemon methods behind it."""

    name: str  #: the Textual action name (``action_<name>`` on the measure screen)
    key: str  #: the key that triggers it
    label: str  #: the short label shown on the button and in the key help
    methods: tuple[str, ...]  #: daemon methods, any of which makes the action legal
    help: str  #: one line saying what it does, for the tooltip
    hidden_unless_allowed: bool = False  #: keep the key help short for rare actions
    short_label: str = ""  #: the label in the key help when the full one is too long for 80 columns

    @property
    def key_help(self) -> str:
        """Return the label shown in the key help at the foot of the screen."""
        return self.short_label or self.label


ACTIONS: tuple[OperatorAction, ...] = (
    OperatorAction("arm", "a", "Arm", (Method.STEP_ARM,), "Start the reading set of this step"),
    OperatorAction(
        "capture", "c", "Capture", (Method.READING_CAPTURE,), "Take the charge so far as a reading"
    ),
    OperatorAction("accept", "k", "Accept", (Method.SET_ACCEPT,), "Keep this set and go on"),
    OperatorAction("redo", "r", "Redo", (Method.SET_REDO,), "Take this set again (asks why)"),
    OperatorAction(
        "pause",
        "p",
        "Pause",
        (Method.SESSION_PAUSE,),
        "Hold the sequence; nothing recorded is lost",
        hidden_unless_allowed=True,
    ),
    OperatorAction(
        "resume",
        "p",
        "Resume",
        (Method.SESSION_RESUME,),
        "Carry on from where the sequence was held",
        hidden_unless_allowed=True,
    ),
    OperatorAction(
        "abort", "x", "Abort", (Method.SESSION_ABORT,), "Abandon the session (asks to confirm)"
    ),
    OperatorAction(
        "environment",
        "t",
        "T & P",
        (Method.ENVIRONMENT_SET,),
        "Enter a new air temperature and pressure",
        short_label="T&P",
    ),
    OperatorAction(
        "manual_done",
        "d",
        "Done by hand",
        (Method.STEP_MANUAL_DONE,),
        "Confirm the step the prompt asks for was done by hand",
        short_label="By hand",
    ),
    OperatorAction(
        "skip",
        "s",
        "Skip",
        (Method.STEP_SKIP,),
        "Skip this optional step",
        hidden_unless_allowed=True,
    ),
)

ACTIONS_BY_NAME: dict[str, OperatorAction] = {action.name: action for action in ACTIONS}


def is_allowed(action: OperatorAction, allowed: Iterable[str]) -> bool:
    """Return True when the daemon allows any of the action's methods now."""
    allowed_set = set(allowed)
    return any(method in allowed_set for method in action.methods)
