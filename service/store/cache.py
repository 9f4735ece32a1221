"""A thread-safe LRU cache bounded by entry count and by bytes, and ``footprint`` to size its entries.

Every cache of loaded versions (the store's, and the API's cache of versions ready to serve) is one of
these, bounded by ``TIKHON_CACHE_MODELS`` entries and ``TIKHON_CACHE_BYTES`` bytes. An entry larger than
the whole byte bound is not kept at all (``put`` returns False): the caller still uses it for the
request at hand, and the next request loads it again.
"""

from __future__ import annotations

import sys
import threading
import types
from collections import OrderedDict
from typing import Any, Callable, Hashable

import numpy as np

_ATOMS = (type(None), bool, int, float, complex, str, bytes, bytearray)
_SKIP = (type, types.ModuleType, types.FunctionType, types.BuiltinFunctionType, types.MethodType)
_ARRAY_HEADER = sys.getsizeof(np.empty(0))


def footprint(obj: Any, *, limit: int = 200_000) -> int:
    """Bytes held by ``obj``: every NumPy buffer reachable from it (each counted once, views by their base),
    plus the Python objects around them (``sys.getsizeof``). Walks attributes, ``__slots__``, dicts, lists,
    tuples and sets; skips classes, modules and functions. Stops after ``limit`` objects (a lower bound then)."""
    seen: set[int] = set()
    buffers: set[int] = set()
    total = 0
    stack = [obj]
    while stack and len(seen) < limit:
        o = stack.pop()
        if id(o) in seen or isinstance(o, _SKIP):
            continue
        seen.add(id(o))
        if isinstance(o, np.ndarray):
            base = o
            while isinstance(base.base, np.ndarray):
                base = base.base
            if id(base) not in buffers:
                buffers.add(id(base))
                total += base.nbytes + _ARRAY_HEADER
            if o.dtype.hasobject:
                stack.extend(o.ravel().tolist())
            continue
        total += sys.getsizeof(o, 64)
        if isinstance(o, _ATOMS):
            continue
        if isinstance(o, dict):
            stack.extend(o.keys())
            stack.extend(o.values())
        elif isinstance(o, (list, tuple, set, frozenset)):
            stack.extend(o)
        else:
            d = getattr(o, "__dict__", None)
            if isinstance(d, dict):
                stack.append(d)
            for cls in type(o).__mro__:
                slots = getattr(cls, "__slots__", ()) or ()
                for slot in (slots,) if isinstance(slots, str) else slots:
                    if isinstance(slot, str) and slot != "__dict__" and hasattr(o, slot):
                        stack.append(getattr(o, slot))
    return total


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
