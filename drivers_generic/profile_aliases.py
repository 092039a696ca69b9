"""The shipped profile names of the first release, kept working as aliases for one release.

The shipped profiles are named for their dialect (``query-plain``, ``push-exponent``,
``query-engineering``). A command line, a plan or a recorded session that still gives an old name
loads the renamed file, and a one-line warning says the old name is deprecated. Remove this table
one release after the rename.
"""

from __future__ import annotations

import logging

log = logging.getLogger(__name__)

#: Old shipped name -> the name of the same profile now.
RENAMED_PROFILES: dict[str, str] = {
    "lumen-q": "query-plain",
    "tallyline": "push-exponent",
    "ohmra-eng": "query-engineering",
}


def current_profile_name(name: str) -> str:
    """Return the shipped profile name for ``name``, with a warning if ``name`` is an old one."""
    renamed = RENAMED_PROFILES.get(name)
    if renamed is None:
        return name
    log.warning(
        "profile name %r is deprecated and will be removed in the next release: use %r",
        name,
        renamed,
    )
    return renamed
