"""How readings are numbered wherever they are shown: the console, the CLI, reports and exports.

Settling readings (taken after a polarity or bias change, kept but never used) are numbered
"s1", "s2", ... and the readings used for results "1", "2", ... in the order taken, so "reading
3" means the same reading in the prompt ("reading 3 of 4"), the list, the live line and every
flag. The stored ``seq`` (1, 2, ... over all readings of a set) stays the order on disk.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

SETTLING_PREFIX = "s"


def reading_labels(settling: Iterable[bool]) -> list[str]:
    """Return the label of each reading of a set, in order, from whether each was settling."""
    labels: list[str] = []
    counts = {True: 0, False: 0}
    for is_settling in settling:
        counts[is_settling] += 1
        number = counts[is_settling]
        labels.append(f"{SETTLING_PREFIX}{number}" if is_settling else str(number))
    return labels


def next_reading_label(settling_so_far: Sequence[bool], settling: bool) -> str:
    """Return the label the next reading of a set will get (``settling``: it is a settling one)."""
    return reading_labels([*settling_so_far, settling])[-1]
