"""One worker-thread call for many concurrent awaits of the same blocking look-up.

When a cached answer expires (the live version number, a key check: both cached for about a second), every
request arriving before the look-up returns would otherwise start its own catalog query in a worker thread:
at a few thousand requests a second that is dozens of identical queries contending for the GIL, once per
second, and a latency spike each time. ``Coalescer.run(key, fn, *args)`` starts ``fn`` in a worker thread
only when no call for ``key`` is in flight; later callers await the same result (or the same exception).
A caller that is cancelled (its client went away) does not cancel the shared call.
"""

from __future__ import annotations

import asyncio
from typing import Any, Callable, Hashable

from anyio import to_thread


class Coalescer:
    def __init__(self) -> None:
        self._inflight: dict[Hashable, asyncio.Future] = {}

    async def run(self, key: Hashable, fn: Callable[..., Any], *args: Any) -> Any:
        fut = self._inflight.get(key)
        if fut is None:
            fut = asyncio.ensure_future(to_thread.run_sync(fn, *args))
            self._inflight[key] = fut
            fut.add_done_callback(lambda _done, key=key: self._inflight.pop(key, None))
        return await asyncio.shield(fut)
