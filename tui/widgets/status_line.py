"""The top line: the daemon link, the electrometer and the session, with trouble said first."""

from __future__ import annotations

from typing import Any

from chargebook.tui import snapshot_view
from chargebook.tui.messages import LinkStatus
from chargebook.tui.widgets.text_block import TextBlock
from textual.reactive import reactive

NOT_CONNECTED = "Not connected to the daemon — retrying…"
WATCHING = "watching: no actions"


def status_text(link: LinkStatus, snapshot: dict[str, Any] | None) -> tuple[str, bool]:
    """Return (the line to show, whether it reports trouble): the worst news comes first; a
    watching console says so first."""
    line, trouble = _status_text(link, snapshot)
    return (f"{WATCHING} · {line}" if link.watching else line), trouble


def _status_text(link: LinkStatus, snapshot: dict[str, Any] | None) -> tuple[str, bool]:
    if not link.connected:
        return f"!! {link.text or NOT_CONNECTED}", True
    if snapshot is None:
        return "Connected to the daemon; waiting for its state…", False
    instrument = snapshot.get("instrument") or {}
    session = snapshot_view.session_text(snapshot)
    record = snapshot.get("record") or {}
    if record.get("message"):
        return f"!! {record['message']} — do not deliver beam · {session}", True
    if not instrument.get("connected"):
        return f"{snapshot_view.instrument_text(snapshot)} · {session}", True
    return f"{session} · electrometer connected", False


class StatusLine(TextBlock):
    """One line: "!! Not connected to the daemon — retrying…", or the session and instrument."""

    link: reactive[LinkStatus] = reactive(LinkStatus(False, NOT_CONNECTED), repaint=False)
    snapshot: reactive[dict[str, Any] | None] = reactive(None, always_update=True, repaint=False)

    def watch_link(self) -> None:
        self._render_line()

    def watch_snapshot(self) -> None:
        self._render_line()

    def _render_line(self) -> None:
        line, trouble = status_text(self.link, self.snapshot)
        self.show(line)
        self.set_class(trouble, "-trouble")
