"""chargebook: electrometer data acquisition and charge-to-dose corrections.

The distribution's top-level package. Its rooms are ``chargebook.acquire``,
``chargebook.corrections``, ``chargebook.drivers_generic`` and ``chargebook.tui``; this folder
holds only what makes ``python -m chargebook`` run the command line.
"""
