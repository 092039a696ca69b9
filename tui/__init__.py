"""The operator console: a Textual client of the chargebook daemon.

It holds no measurement state of its own (everything shown comes from the daemon's latest
snapshot) and closing it never stops a measurement. Start it with ``chargebook console`` or
:func:`chargebook.tui.app.run_console`.
"""
