"""How readings are named everywhere: settling readings s1, s2, then the used readings 1, 2, ..."""

from __future__ import annotations

from chargebook.acquire.session.numbering import next_reading_label, reading_labels


def test_settling_readings_are_numbered_apart_from_the_readings_used() -> None:
    assert reading_labels([True, True, False, False, False]) == ["s1", "s2", "1", "2", "3"]
    # A settling reading after a resumed set (a bias change mid-set) keeps the used numbers going.
    assert reading_labels([True, False, True, False]) == ["s1", "1", "s2", "2"]
    assert reading_labels([]) == []


def test_the_next_label_is_the_one_the_reading_will_get() -> None:
    assert next_reading_label([True, False], settling=False) == "2"
    assert next_reading_label([True, False], settling=True) == "s2"
    assert next_reading_label([], settling=True) == "s1"
