"""Large prediction requests answered in separate, lower-priority processes, so single rows keep their speed.

A batch of 100,000 rows is a few hundred milliseconds of work, much of it in the interpreter (reading the
body, the warnings, writing the answer). In the API process that work shares one interpreter lock with the
event loop, and single-row predictions on the same process wait behind it: measured with
``benchmarks/bench_pressure.py --only wide_batch`` on a 2-core machine, their p99 went from about 2 ms to
about 200 ms while such batches arrived, and stayed near the quiet figure when the same batches went to a
second process at a lower CPU priority. So a prediction body larger than ``predict_process_bytes`` goes to
the *prediction processes* (``predict_processes`` of them; 0 keeps every request in the API process):
spawned on first use, dying with the API process, at the training processes' lower priority
(``service.lifeline``), so a busy host serves single rows first.

What crosses to the process is small and plain: the version's folder and manifest checksum (the process
reads, verifies and rebuilds the version itself, and keeps it in its own cache bounded like the API
process's, ``cache_models`` and ``cache_bytes``), the body's bytes and what the request asks
(``predict_io.Ask``). What comes back is the finished answer (the same bytes the API process would have
written, from the same ``service.api.predict_io`` functions), the row count and, when monitoring is on,
the rows' monitoring counts, which the API process adds to its own (``Monitor.add_inputs``). Errors are
``TikhonError`` instances and keep their problem details across the process boundary.

Bounded: at most ``QUEUED_PER_PROCESS`` requests per process wait or run at once (their bodies are held
in memory); one more is answered 429 with ``Retry-After``. A process that dies (killed, out of memory) is
replaced for the next request, and the request it held is answered 429 to be sent again.
"""

from __future__ import annotations

import asyncio
import os
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path
from typing import Any

from service.api.spawned import SpawnedPool
from service.errors import Busy

QUEUED_PER_PROCESS = 4

# -- in the prediction process -----------------------------------------------------------------------
_CACHE: Any = None  # service.store.cache.LRUCache of Served, keyed by (folder, manifest checksum)


def _start(parent_pid: int, cache_models: int, cache_bytes: int) -> None:
    """Initializer of a prediction process: die with the API process, lower CPU priority, an empty cache."""
    global _CACHE
    from service.lifeline import die_with_parent, lower_priority
    from service.store.cache import LRUCache

    die_with_parent(parent_pid)
    lower_priority()
    _CACHE = LRUCache(cache_models, cache_bytes)


def _served(name: str, version: int, folder: str, checksum: str) -> Any:
    """The version at ``folder`` whose manifest has SHA-256 ``checksum``, verified and rebuilt (cached)."""
    from service.api.model_cache import served_from
    from service.engine import load_model
    from service.store import artifact
    from service.store.cache import footprint

    key = (folder, checksum)
    hit = _CACHE.get(key) if _CACHE is not None else None
    if hit is not None:
        return hit
    where = Path(folder)
    manifest, manifest_size = artifact.read_manifest(where, expected_sha256=checksum, name=name, version=version)
    arrays, arrays_size = artifact.read_arrays(where, manifest, name=name, version=version)
    model = load_model(manifest["training"], arrays)
    served = served_from(name, version, model, manifest, folder=folder, checksum=checksum,
                         nbytes=max(arrays_size + manifest_size, footprint((model, manifest))))
    if _CACHE is not None:
        _CACHE.put(key, served, served.nbytes)
    return served


def answer_here(ref: tuple[str, int, str, str], raw: bytes, ask: Any, limits: dict[str, Any],
                monitor: bool) -> tuple[int, bytes | str, str, dict, dict | None]:
    """One request, start to finish: ``(rows, body, media type, headers, monitoring counts or None)``.
    Runs in a prediction process (or inline, in tests)."""
    from service.api import levels, predict_io
    from service.api.monitor import input_counts

    served = _served(*ref)
    cols, interval_level, n, unseen = predict_io.read(served, raw, ask, limits)
    del raw
    if unseen == "refuse" and served.model.categories.names:
        levels.refuse_unseen(served.model, cols)
    detail = served.model.predict_detail(cols, interval_level=interval_level, memory_bytes=limits["predict_memory_bytes"])
    counts = input_counts(served, cols, detail) if monitor else None
    body, media, headers = predict_io.answer(served, detail, interval_level, ask)
    return n, body, media, headers, counts


# -- in the API process ------------------------------------------------------------------------------
class PredictLane(SpawnedPool):
    """The API process's prediction processes: ``processes`` of them (0: none, every request is answered in
    the API process), for bodies larger than ``min_bytes``."""

    def __init__(self, processes: int, min_bytes: int, *, cache_models: int, cache_bytes: int):
        super().__init__(processes)
        self.min_bytes = min_bytes
        self._cache = (cache_models, cache_bytes)
        self._held = 0  # requests waiting or running (event loop only)

    def _initializer(self):
        return _start, (os.getpid(), *self._cache)

    def takes(self, size: int) -> bool:
        return self.processes > 0 and size > self.min_bytes

    async def answer(self, served: Any, raw: bytes, ask: Any, limits: dict[str, Any],
                     monitor: bool) -> tuple[int, bytes | str, str, dict, dict | None]:
        """``answer_here`` in a prediction process. Raises ``Busy`` (429) when ``QUEUED_PER_PROCESS`` requests
        per process are already held, or when the process died before answering."""
        if self._held >= QUEUED_PER_PROCESS * self.processes:
            raise Busy(f"{self._held} large prediction requests are already being answered by this server "
                       f"(at most {QUEUED_PER_PROCESS * self.processes}); send this one again shortly, or raise "
                       "TIKHON_PREDICT_PROCESSES.", retry_after=1)
        ref = (served.name, int(served.version), served.folder, served.checksum)
        self._held += 1
        try:
            pool = self._executor()
            try:
                future = pool.submit(answer_here, ref, raw, ask, limits, monitor)
                del raw
                return await asyncio.wrap_future(future)
            except BrokenProcessPool:
                self._drop(pool)
                raise Busy("the process answering large prediction requests ended before it finished this one (it "
                           "was killed or ran out of memory); nothing was changed. Send it again, or in smaller "
                           "batches (TIKHON_PREDICT_MEMORY_BYTES bounds one request's working memory).",
                           retry_after=1) from None
        finally:
            self._held -= 1
