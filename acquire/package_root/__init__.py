"""chargebook: electrometer data acquisition and charge-to-dose corrections.

The distribution's top-level package. Its rooms are ``chargebook.acquire``,
``chargebook.corrections``, ``chargebook.drivers_generic`` and ``chargebook.tui``; this folder
holds only what makes ``python -m chargebook`` run the command line, and the caution shown with
every result (here, where ``chargebook --help`` finds it without loading the daemon's protocol;
``chargebook.acquire.protocol.CAUTION`` is the same text, the name every room uses).
"""

#: Shown with every result: by the console, the command line, reports and exports.
CAUTION = (
    "chargebook supports, and never replaces, the judgement of a qualified medical physicist "
    "working under local regulations and the local code of practice."
)
