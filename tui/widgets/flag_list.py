"""Every flag in full, at full width: the set on screen, its readings, and the session."""

from __future__ import annotations

from typing import Any

from chargebook.tui import snapshot_view, text
from chargebook.tui.widgets.reading_set import reading_flag_lines
from chargebook.tui.widgets.text_block import TextBlock

#: Severities that ask the operator to look (info flags are stated for the record only).
LOOK_SEVERITIES = ("warning", "error")


def flag_count(set_info: dict[str, Any] | None, snapshot: dict[str, Any]) -> int:
    """Return how many warnings and errors the set on screen, its readings and the session carry."""
    readings = (set_info or {}).get("readings", [])
    flags = [
        *((set_info or {}).get("flags") or []),
        *(item for reading in readings for item in reading.get("flags") or []),
        *snapshot_view.session_flags(snapshot, set_info),
    ]
    return sum(1 for item in flags if item.get("severity") in LOOK_SEVERITIES)


def flag_text(set_info: dict[str, Any] | None, snapshot: dict[str, Any]) -> str:
    """Return the flags in words, under a heading for the set and one for the session."""
    set_name = snapshot_view.set_title(set_info) if set_info else "no set yet"
    session_lines = text.flags_or_ok(
        snapshot_view.session_flags(snapshot, set_info), "session: no other flags"
    )
    return "\n".join(
        [
            f"This set ({set_name}):",
            *(reading_flag_lines(set_info) or ["ok no readings yet"]),
            "",
            "Session:",
            *session_lines,
        ]
    )


class FlagList(TextBlock):
    """All flags of the set on screen and of the session, each with its text marker."""

    def show_flags(self, set_info: dict[str, Any] | None, snapshot: dict[str, Any]) -> None:
        """Show the flags of ``set_info`` and of the session in ``snapshot``."""
        self.show(flag_text(set_info, snapshot))
