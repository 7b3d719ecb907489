"""Replayed messages a subscriber already has.

When a subscriber joins, the publisher sends the latest message of each topic again, marked
``"replay": true`` and keeping its ``seq`` (:mod:`spinflip.daemon.live.publisher`). Every
subscriber receives it; one that already took that very message must not take it again as new
data, while one that missed it should. :class:`ReplayFilter` tells the two apart.
"""

from __future__ import annotations

from typing import Any


class ReplayFilter:
    """The latest message taken per (station, topic), by its ``seq`` and ``time_utc``.

    Parameters
    ----------
    max_keys : int
        Most (station, topic) pairs remembered; past it new pairs are not remembered (their
        replays are then taken again), so a hostile stream of station names cannot grow it.
    """

    def __init__(self, max_keys: int = 1024):
        self.max_keys = int(max_keys)
        self.repeats = 0                 # replays passed over because they were already taken
        self._latest: dict[tuple[Any, str], tuple[Any, Any]] = {}

    def take(self, topic: str, header: dict[str, Any]) -> bool:
        """True if the message is to be taken (and remember it); False for a replay of the
        latest message already taken of its station and topic (counted in :attr:`repeats`)."""
        key = (header.get("station"), topic)
        ident = (header.get("seq"), header.get("time_utc"))
        if header.get("replay") is True and self._latest.get(key) == ident:
            self.repeats += 1
            return False
        if len(self._latest) < self.max_keys or key in self._latest:
            self._latest[key] = ident
        return True
