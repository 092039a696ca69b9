"""Read what a running Textual app shows, as plain text lines (the terminal without colour)."""

from __future__ import annotations

import io

from rich.console import Console
from textual.app import App


def screen_text(app: App) -> str:
    """Return the characters on the app's screen, one line per terminal row.

    Drawn the way ``App.export_screenshot`` draws the screen, then exported as text: what an
    operator would read, colour removed (and no-break spaces read as spaces).
    """
    width, height = app.size
    console = Console(
        width=width,
        height=height,
        file=io.StringIO(),
        force_terminal=True,
        record=True,
        legacy_windows=False,
        safe_box=False,
    )
    update = app.screen._compositor.render_update(
        full=True, screen_stack=app._background_screens, simplify=True
    )
    console.print(update)
    return console.export_text(styles=False).replace("\u00a0", " ")
