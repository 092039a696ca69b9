"""Messages that travel up the console's widget tree, as dataclasses.

The daemon link (a worker on the app) posts :class:`SnapshotArrived` and :class:`LinkChanged`;
widgets post :class:`ActionRequested` when the operator clicks a button.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from textual.message import Message


@dataclass(frozen=True, slots=True)
class LinkStatus:
    """Whether the console is attached to the daemon, and what to tell the operator."""

    connected: bool
    text: str
    watching: bool = False  # attached to the watch-only socket: no actions offered


@dataclass
class SnapshotArrived(Message):
    """The daemon sent its whole state (a ``protocol.Snapshot`` dict)."""

    snapshot: dict[str, Any]


@dataclass
class LinkChanged(Message):
    """The connection to the daemon opened or was lost."""

    status: LinkStatus


@dataclass
class ActionRequested(Message):
    """The operator asked for an action (by button); ``name`` is an ``OperatorAction.name``."""

    name: str


@dataclass
class SetupFinished(Message):
    """The setup form opened the session and the daemon recorded the air data."""
