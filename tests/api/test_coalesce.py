"""Concurrent awaits of one blocking look-up share a single worker-thread call (common practice:
"single flight" request coalescing in front of a cache)."""

from __future__ import annotations

import asyncio
import threading

import pytest

from service.api.coalesce import Coalescer
from service.errors import NotFound


def test_concurrent_callers_share_one_call_and_its_result():
    calls = []
    release = threading.Event()

    def lookup(name: str) -> int:
        calls.append(name)
        release.wait(10)
        return 7

    async def main():
        c = Coalescer()
        tasks = [asyncio.ensure_future(c.run(("live", "pumps"), lookup, "pumps")) for _ in range(20)]
        other = asyncio.ensure_future(c.run(("live", "fans"), lookup, "fans"))
        await asyncio.sleep(0.2)
        release.set()
        results = await asyncio.gather(*tasks, other)
        again = await c.run(("live", "pumps"), lookup, "pumps")  # nothing in flight any more: a new call
        return results, again

    results, again = asyncio.run(main())
    assert results == [7] * 21 and again == 7
    assert sorted(calls) == ["fans", "pumps", "pumps"]


def test_every_waiter_gets_the_exception_and_a_cancelled_waiter_does_not_cancel_the_call():
    calls = []
    release = threading.Event()

    def lookup() -> int:
        calls.append(1)
        release.wait(10)
        raise NotFound("model 'x' has no live version yet")

    async def main():
        c = Coalescer()
        first = asyncio.ensure_future(c.run("k", lookup))
        second = asyncio.ensure_future(c.run("k", lookup))
        await asyncio.sleep(0.1)
        first.cancel()  # its client went away
        await asyncio.sleep(0.05)
        release.set()
        with pytest.raises(NotFound):
            await second
        assert first.cancelled()

    asyncio.run(main())
    assert calls == [1]
