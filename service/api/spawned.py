"""A small pool of spawned helper processes of the API process (the intake and prediction processes).

Started on first use, with the spawn method (never fork a process that runs threads: the event loop's pool,
uvicorn); a pool whose process died (killed, out of memory) is dropped, and the next use starts a new one.
Subclasses say how each process starts (``_initializer``): typically dying with the API process and
running at a lower CPU priority (``service.lifeline``).
"""

from __future__ import annotations

import multiprocessing as mp
import threading
from concurrent.futures import ProcessPoolExecutor
from typing import Any, Callable

SPAWN = mp.get_context("spawn")


class SpawnedPool:
    """``processes`` spawned processes behind a ``ProcessPoolExecutor``, started on first use."""

    def __init__(self, processes: int):
        self.processes = processes
        self._pool: ProcessPoolExecutor | None = None
        self._lock = threading.Lock()

    def _initializer(self) -> tuple[Callable[..., None], tuple[Any, ...]]:
        """(function, arguments) each process runs first."""
        raise NotImplementedError

    def _executor(self) -> ProcessPoolExecutor:
        with self._lock:
            if self._pool is None:
                start, args = self._initializer()
                self._pool = ProcessPoolExecutor(self.processes, mp_context=SPAWN, initializer=start, initargs=args)
            return self._pool

    def _drop(self, pool: ProcessPoolExecutor) -> None:
        """Forget ``pool`` (one of its processes died); the next use starts a new one."""
        with self._lock:
            if self._pool is pool:
                self._pool = None
        pool.shutdown(wait=False, cancel_futures=True)

    def close(self) -> None:
        with self._lock:
            pool, self._pool = self._pool, None
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
