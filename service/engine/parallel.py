"""Both cores in one process: row blocks on threads, BLAS on one thread each.

The heavy work of a pass over the rows (basis expansion, Gram matrices and triangular solves of the
summaries) is numpy and BLAS, which release the GIL, so Python threads run it on every core. BLAS's own
threads are then limited to one per worker thread (threadpoolctl), so the two kinds of threads never
oversubscribe the cores: on a busy host, a multi-threaded BLAS whose threads wait for each other can be
ten times slower on the small matrices of a summary than one thread.

``ordered_map`` yields results in input order whatever thread finishes first, so a pass's arithmetic,
and therefore its result, does not depend on the number of threads or their timing.
"""

from __future__ import annotations

import os
import sys
import threading
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from typing import Any, Callable, Iterable, Iterator


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not Linux
        return max(1, os.cpu_count() or 1)


_CONTROLLER: tuple[int, Any] | None = None  # (len(sys.modules) when made, threadpoolctl.ThreadpoolController)
_CONTROLLER_LOCK = threading.Lock()


def _controller():
    """One ``ThreadpoolController`` for the process, made again only after a module was imported since (a new
    native library comes with an import): making one scans every loaded library (about 2 ms), which a job
    that limits BLAS around each of its steps would otherwise pay at every step."""
    global _CONTROLLER
    from threadpoolctl import ThreadpoolController

    with _CONTROLLER_LOCK:
        if _CONTROLLER is None or _CONTROLLER[0] != len(sys.modules):
            _CONTROLLER = (len(sys.modules), ThreadpoolController())
        return _CONTROLLER[1]


@contextmanager
def single_blas():
    """BLAS and OpenMP pools limited to one thread while the block runs (process-wide)."""
    with _controller().limit(limits=1):
        yield


def ordered_map(fn: Callable[[Any], Any], items: Iterable[Any], threads: int) -> Iterator[Any]:
    """``fn`` over ``items`` on up to ``threads`` threads, results yielded in input order. Items are taken
    from ``items`` (an iterator: a reader) in this thread, at most ``threads`` ahead of the results, so
    memory holds at most ``2 × threads`` items and results at once."""
    if threads <= 1:
        for item in items:
            yield fn(item)
        return
    pending: deque = deque()
    with ThreadPoolExecutor(max_workers=threads, thread_name_prefix="tikhon-rows") as pool:
        try:
            for item in items:
                pending.append(pool.submit(fn, item))
                if len(pending) >= threads:
                    yield pending.popleft().result()
            while pending:
                yield pending.popleft().result()
        finally:
            for f in pending:
                f.cancel()
