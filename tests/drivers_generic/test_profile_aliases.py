"""The first release's profile names still load, for one release, with a note that they are old.

This file keeps the old names on purpose (the renaming script skips it).
"""

from __future__ import annotations

import logging
import subprocess
import sys

import pytest
from chargebook.drivers_generic import ProfileError, available_profiles, load_profile
from chargebook.drivers_generic.profile_aliases import RENAMED_PROFILES

OLD_TO_NEW = [
    ("lumen-q", "query-plain"),
    ("tallyline", "push-exponent"),
    ("ohmra-eng", "query-engineering"),
]


@pytest.mark.parametrize(("old", "new"), OLD_TO_NEW)
def test_an_old_name_loads_the_renamed_profile_and_says_it_is_deprecated(old, new, caplog):
    with caplog.at_level(logging.WARNING, logger="chargebook.drivers_generic.profile_aliases"):
        profile = load_profile(old)
    assert profile.name == new and profile.source == load_profile(new).source
    notes = [record.getMessage() for record in caplog.records]
    assert len(notes) == 1
    assert old in notes[0] and new in notes[0] and "deprecated" in notes[0]


def test_the_new_names_load_without_a_note(caplog):
    with caplog.at_level(logging.WARNING):
        for name in available_profiles():
            load_profile(name)
    assert caplog.records == []


def test_old_names_are_aliases_only_not_shipped_files():
    assert set(RENAMED_PROFILES) == {old for old, _ in OLD_TO_NEW}
    assert not set(RENAMED_PROFILES) & set(available_profiles())
    assert set(RENAMED_PROFILES.values()) <= set(available_profiles())


def test_an_unknown_name_is_still_refused_listing_the_current_names():
    with pytest.raises(ProfileError, match="push-exponent, query-engineering, query-plain"):
        load_profile("lumen-z")


def test_the_note_is_one_line_on_stderr_without_any_logging_setup():
    code = (
        "from chargebook.drivers_generic import load_profile; print(load_profile('tallyline').name)"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=True
    )
    assert done.stdout == "push-exponent\n"
    lines = done.stderr.splitlines()
    assert len(lines) == 1 and "'tallyline' is deprecated" in lines[0], done.stderr
