"""Serving through a catalog outage: the catalog's last answers, kept with their time, for a bounded while.

A prediction needs two things from the catalog: whether the caller's key is active (and which scopes it
holds), and which version of the model is live. Both are cached for about a second in normal operation
(``auth_cache_s``, ``live_cache_s``). When the catalog stops answering (a PostgreSQL restart, a failover,
a network cut) those caches expire and every prediction would fail, although the replica holds the
loaded version in memory and checked the key a moment ago.

``LastKnown`` keeps every answer the catalog gave, stamped with when it gave it. While the catalog raises
``CatalogUnavailable``, a prediction may use the last answer if it is at most ``stale_ok_s`` seconds old
(``TIKHON_STALE_OK_S``); the response then carries ``Tikhon-Catalog: stale; age=<s>``, the age in whole
seconds of the oldest answer it relied on. Older knowledge, or none, gives the 503 ``catalog-unavailable``
problem with ``Retry-After``.

What this bounds:

* a key revoked while the catalog is unreachable from this replica keeps working here for at most
  ``stale_ok_s`` after its last successful check, and at most ``auth_cache_s`` after the catalog answers
  again (stale answers are never used once a fresh one can be had, and never refresh the fresh cache);
* a live switch made elsewhere during the outage is likewise seen ``live_cache_s`` after the catalog
  answers again;
* writes (trainings, live switches, keys) never use stale knowledge: they answer 503.

``CatalogWatch`` remembers that the catalog just failed, so that for ``retry_s`` seconds requests with
usable stale knowledge do not each wait for a connection attempt; one request per ``retry_s`` tries
the catalog, and the first success ends the outage.
"""

from __future__ import annotations

import threading
import time
from typing import Any, Callable, Hashable

from service.errors import CatalogUnavailable

HEADER = "Tikhon-Catalog"


def header_value(age_s: float) -> str:
    """``stale; age=<whole seconds>`` (seconds rounded down, like HTTP's Age header, RFC 9111 section 5.1)."""
    return f"stale; age={max(0, int(age_s))}"


class CatalogWatch:
    """Whether the catalog failed in the last ``retry_s`` seconds (so callers holding stale knowledge use it
    at once instead of waiting for another failed connection)."""

    def __init__(self, retry_s: float = 1.0, *, clock: Callable[[], float] = time.monotonic):
        self.retry_s = float(retry_s)
        self._clock = clock
        self._failed_at: float | None = None
        self._tried_at = 0.0
        self._lock = threading.Lock()

    def failed(self) -> None:
        with self._lock:
            self._failed_at = self._tried_at = self._clock()

    def ok(self) -> None:
        with self._lock:
            self._failed_at = None

    @property
    def down(self) -> bool:
        return self._failed_at is not None

    def should_skip(self) -> bool:
        """True when the catalog failed recently and someone tried it less than ``retry_s`` ago; False
        grants this caller the next attempt (at most one caller per ``retry_s``)."""
        with self._lock:
            if self._failed_at is None:
                return False
            now = self._clock()
            if now - self._tried_at < self.retry_s:
                return True
            self._tried_at = now
            return False


class LastKnown:
    """The last value the catalog gave for each key, with the time it gave it (bounded count)."""

    def __init__(self, stale_ok_s: float, watch: CatalogWatch, *, limit: int = 10_000,
                 clock: Callable[[], float] = time.monotonic):
        self.stale_ok_s = float(stale_ok_s)
        self.watch = watch
        self._limit = limit
        self._clock = clock
        self._lock = threading.Lock()
        self._values: dict[Hashable, tuple[Any, float]] = {}

    def remember(self, key: Hashable, value: Any) -> None:
        with self._lock:
            if key not in self._values and len(self._values) >= self._limit:
                self._values.pop(next(iter(self._values)))  # the oldest entry goes
            self._values.pop(key, None)
            self._values[key] = (value, self._clock())

    def forget(self, key: Hashable) -> None:
        with self._lock:
            self._values.pop(key, None)

    def forget_kind(self, *kinds: str) -> None:
        """Forget every key whose first element is one of ``kinds`` (keys are tuples like ``("live", name)``)."""
        with self._lock:
            for key in [k for k in self._values if isinstance(k, tuple) and k and k[0] in kinds]:
                del self._values[key]

    def usable(self, key: Hashable) -> bool:
        hit = self._values.get(key)
        return hit is not None and self._clock() - hit[1] <= self.stale_ok_s

    def recall(self, key: Hashable, err: CatalogUnavailable, what: str) -> tuple[Any, float]:
        """``(value, age_s)`` of the last answer for ``key`` when it is young enough; else ``err`` again,
        its detail saying why stale knowledge could not stand in."""
        with self._lock:
            hit = self._values.get(key)
        if hit is None:
            raise CatalogUnavailable(
                f"{err.detail} This replica has no earlier answer for {what} to serve meanwhile.") from err
        age = self._clock() - hit[1]
        if age > self.stale_ok_s:
            raise CatalogUnavailable(
                f"{err.detail} This replica's last answer for {what} is {age:.0f} s old, beyond the "
                f"{self.stale_ok_s:g} s it may serve without the catalog (TIKHON_STALE_OK_S).") from err
        return hit[0], age

    def lookup(self, key: Hashable, fetch: Callable[[], Any], what: str, *, allow_stale: bool) -> tuple[Any, float | None]:
        """``fetch()`` from the catalog and remember it, or, when the catalog is unavailable and
        ``allow_stale``, the last answer: ``(value, None)`` fresh, ``(value, age_s)`` stale."""
        if allow_stale and self.watch.should_skip() and self.usable(key):
            return self.recall(key, CatalogUnavailable("the catalog does not answer."), what)
        try:
            value = fetch()
        except CatalogUnavailable as err:
            self.watch.failed()
            if not allow_stale:
                raise
            return self.recall(key, err, what)
        self.watch.ok()
        self.remember(key, value)
        return value, None


def note_stale(request: Any, age_s: float) -> None:
    """Record on the request that its answer rests on catalog knowledge ``age_s`` seconds old (the request
    context middleware turns it into the ``Tikhon-Catalog`` header; the oldest age recorded wins)."""
    state = request.scope.setdefault("state", {})
    state["catalog_age"] = max(float(age_s), state.get("catalog_age") or 0.0)
