"""A least-recently-used cache bounded by the memory its values are estimated to hold.

A bound on the number of entries alone lets a few huge entries (parse trees of megabyte
statements) hold gigabytes; here each entry is weighed when stored, an entry heavier than
``most_entry_bytes`` is not stored at all, and the lightest-used entries leave until the total
fits ``most_bytes``. Thread-safe: statements are split on the event loop and on the parse lane.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from typing import Callable, Generic, Hashable, TypeVar

K = TypeVar("K", bound=Hashable)
V = TypeVar("V")


class SizedCache(Generic[K, V]):
    """LRU by estimated bytes; ``weigh(key, value)`` estimates an entry's bytes."""

    def __init__(self, weigh: Callable[[K, V], int], *, most_bytes: int,
                 most_entry_bytes: int) -> None:
        self.weigh = weigh
        self.most_bytes = most_bytes
        self.most_entry_bytes = most_entry_bytes
        self.bytes = 0
        self._entries: OrderedDict[K, tuple[V, int]] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: K) -> V | None:
        with self._lock:
            entry = self._entries.get(key)
            if entry is None:
                return None
            self._entries.move_to_end(key)
            return entry[0]

    def put(self, key: K, value: V) -> None:
        """Stores the value unless it alone weighs more than ``most_entry_bytes``."""
        weight = self.weigh(key, value)
        if weight > self.most_entry_bytes:
            return
        with self._lock:
            old = self._entries.pop(key, None)
            if old is not None:
                self.bytes -= old[1]
            self._entries[key] = (value, weight)
            self.bytes += weight
            while self.bytes > self.most_bytes and self._entries:
                _, (_, dropped) = self._entries.popitem(last=False)
                self.bytes -= dropped

    def clear(self) -> None:
        with self._lock:
            self._entries.clear()
            self.bytes = 0

    def __len__(self) -> int:
        return len(self._entries)
