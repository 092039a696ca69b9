"""The sequence's states and the transitions between them, as tables.

``TRANSITIONS`` says which state may follow which; ``ACTION_STATES`` says in which states each
operator action may be asked for. The engine checks both, so an illegal request raises
:class:`IllegalTransition` naming the current state and the actions allowed in it.

    idle ─start─▶ waiting_for_operator ─arm─▶ settling ─▶ collecting ─▶ reviewing
                        ▲                                                 │ accept
                        └──────────── next step (or redo) ◀───────────────┘
    any active state ─pause─▶ paused ─resume─▶ the state it left
    settling/collecting ─instrument lost─▶ interrupted ─arm (continue) | redo─▶ …
    any active state ─stop─▶ finished,  ─abort─▶ aborted;  finished/aborted ─close─▶ idle
"""

from __future__ import annotations

from chargebook.acquire.protocol import EngineState, Method

S = EngineState

#: The states in which a session is open and its sequence can go on.
ACTIVE: frozenset[EngineState] = frozenset(
    {S.WAITING_FOR_OPERATOR, S.SETTLING, S.COLLECTING, S.REVIEWING, S.PAUSED, S.INTERRUPTED}
)

#: The states that may follow each state.
TRANSITIONS: dict[EngineState, frozenset[EngineState]] = {
    S.IDLE: frozenset({S.WAITING_FOR_OPERATOR}),
    S.WAITING_FOR_OPERATOR: frozenset(
        {S.WAITING_FOR_OPERATOR, S.SETTLING, S.COLLECTING, S.PAUSED, S.FINISHED, S.ABORTED}
    ),
    S.SETTLING: frozenset(
        {S.COLLECTING, S.REVIEWING, S.WAITING_FOR_OPERATOR, S.PAUSED, S.INTERRUPTED}
        | {S.FINISHED, S.ABORTED}
    ),
    S.COLLECTING: frozenset(
        {S.REVIEWING, S.WAITING_FOR_OPERATOR, S.PAUSED, S.INTERRUPTED, S.FINISHED, S.ABORTED}
    ),
    S.REVIEWING: frozenset({S.WAITING_FOR_OPERATOR, S.PAUSED, S.FINISHED, S.ABORTED}),
    S.PAUSED: frozenset(
        {S.WAITING_FOR_OPERATOR, S.SETTLING, S.COLLECTING, S.REVIEWING, S.INTERRUPTED}
        | {S.FINISHED, S.ABORTED}
    ),
    S.INTERRUPTED: frozenset(
        {S.SETTLING, S.COLLECTING, S.WAITING_FOR_OPERATOR, S.FINISHED, S.ABORTED}
    ),
    S.FINISHED: frozenset({S.IDLE}),
    S.ABORTED: frozenset({S.IDLE}),
}

_BUSY = frozenset({S.SETTLING, S.COLLECTING})

#: The states in which each operator action may be asked for. The engine adds guards that
#: depend on more than the state (a manual step pending, the instrument connected, ...).
ACTION_STATES: dict[str, frozenset[EngineState]] = {
    Method.SESSION_START: frozenset({S.IDLE}),
    Method.ENVIRONMENT_SET: ACTIVE,
    Method.STEP_ARM: frozenset({S.WAITING_FOR_OPERATOR, S.INTERRUPTED}),
    Method.STEP_MANUAL_DONE: frozenset({S.WAITING_FOR_OPERATOR}),
    Method.STEP_SKIP: frozenset({S.WAITING_FOR_OPERATOR}),
    Method.READING_CAPTURE: _BUSY,
    Method.READING_SHORT: ACTIVE,
    Method.SET_ACCEPT: frozenset({S.REVIEWING}),
    Method.SET_REDO: _BUSY | {S.REVIEWING, S.INTERRUPTED},
    Method.SESSION_PAUSE: _BUSY | {S.WAITING_FOR_OPERATOR, S.REVIEWING},
    Method.SESSION_RESUME: frozenset({S.PAUSED}),
    Method.SESSION_STOP: ACTIVE,
    Method.SESSION_ABORT: ACTIVE,
    Method.SESSION_CLOSE: frozenset({S.FINISHED, S.ABORTED}),
}


class IllegalTransition(Exception):
    """An operator action or a state change that is not legal now.

    ``state`` is the current state, ``action`` what was asked, ``allowed`` the actions legal
    now; the message says all three, plus ``why`` when a guard (not the state) refused it.
    """

    def __init__(
        self, action: str, state: EngineState, allowed: list[str], why: str | None = None
    ) -> None:
        self.action = action
        self.state = state
        self.allowed = list(allowed)
        self.why = why
        allowed_text = ", ".join(self.allowed) or "nothing"
        reason = f": {why}" if why else ""
        super().__init__(
            f"cannot {action} while the sequence is {state.value.replace('_', ' ')}{reason}; "
            f"allowed now: {allowed_text}"
        )


def check_transition(current: EngineState, new: EngineState, action: str) -> None:
    """Raise IllegalTransition unless ``new`` may follow ``current`` in TRANSITIONS."""
    if new not in TRANSITIONS[current]:
        allowed = [name for name, states in ACTION_STATES.items() if current in states]
        raise IllegalTransition(action, current, allowed, f"{new.value} cannot follow it")
