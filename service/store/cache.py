"""A thread-safe LRU cache bounded by entry count and by bytes."""

from __future__ import annotations

import threading
from collections import OrderedDict
from typing import Any, Callable, Hashable


class LRUCache:
    def __init__(self, max_items: int, max_bytes: int):
        self.max_items = max_items
        self.max_bytes = max_bytes
        self._data: OrderedDict[Hashable, tuple[Any, int]] = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()
        self.hits = 0
        self.misses = 0
        self.evictions = 0

    def get(self, key: Hashable) -> Any | None:
        with self._lock:
            item = self._data.get(key)
            if item is None:
                self.misses += 1
                return None
            self._data.move_to_end(key)
            self.hits += 1
            return item[0]

    def put(self, key: Hashable, value: Any, nbytes: int) -> bool:
        """Insert ``value``; return False (and keep nothing) when it alone exceeds the byte bound."""
        if nbytes > self.max_bytes:
            return False
        with self._lock:
            old = self._data.pop(key, None)
            if old is not None:
                self._bytes -= old[1]
            self._data[key] = (value, nbytes)
            self._bytes += nbytes
            while len(self._data) > self.max_items or self._bytes > self.max_bytes:
                _, (_, b) = self._data.popitem(last=False)
                self._bytes -= b
                self.evictions += 1
            return True

    def discard_where(self, predicate: Callable[[Hashable], bool]) -> int:
        with self._lock:
            doomed = [k for k in self._data if predicate(k)]
            for k in doomed:
                self._bytes -= self._data.pop(k)[1]
            return len(doomed)

    def __len__(self) -> int:
        return len(self._data)

    def __contains__(self, key: Hashable) -> bool:
        return key in self._data

    def stats(self) -> dict[str, int]:
        with self._lock:
            return {
                "hits": self.hits,
                "misses": self.misses,
                "evictions": self.evictions,
                "items": len(self._data),
                "bytes": self._bytes,
                "max_items": self.max_items,
                "max_bytes": self.max_bytes,
            }
