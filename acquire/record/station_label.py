"""How a station is named where several are listed together (a department record)."""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from chargebook.acquire.record.reader import RecordReader

#: Characters of a station's UUID that stand for it where another station has the same name;
#: ``--station`` takes them as well as the whole UUID.
UUID_PREFIX_CHARS = 8


def station_choices(stations: Iterable[tuple[str, str]]) -> dict[str, str]:
    """Return, by UUID, what ``--station`` takes to choose each station, given as (UUID, name):
    its name, or, where stations share a name (say two that kept their default, the host's
    name), the start of its UUID."""
    named = dict(stations)
    shared = Counter(name.casefold() for name in named.values())
    return {
        uuid: name if shared[name.casefold()] == 1 else uuid[:UUID_PREFIX_CHARS]
        for uuid, name in named.items()
    }


def station_labels(stations: Iterable[tuple[str, str]]) -> dict[str, str]:
    """Return each station's label by UUID, given as (UUID, name): its name, followed by the
    start of its UUID where stations share the name."""
    named = dict(stations)
    choices = station_choices(named.items())
    return {
        uuid: name if choices[uuid] == name else f"{name} ({choices[uuid]})"
        for uuid, name in named.items()
    }


def stations_of(stores: Iterable[RecordReader]) -> list[tuple[str, str]]:
    """Return the (UUID, name) of each store's station, as the functions above take them."""
    return [(station.uuid, station.name) for station in (store.station() for store in stores)]
