"""Where the map-reduce of a streamed training runs: in this process, or on a Dask cluster.

Both executors offer one operation, ``map_reduce(fn, items, combine)``: apply ``fn`` to every item,
then fold the results with ``combine`` as a balanced binary tree in item order. Because the tree's
shape depends only on the number of items, the result does not depend on which task finished first.
On Dask, the tasks and the combines run on the cluster (only the final, small summary travels back);
progress is reported as tasks complete, and a stop request cancels every outstanding future.

BLAS runs on one thread per Dask worker thread (a worker plugin, ``threadpoolctl``), as it does per row
thread in this process (``parallel``): a pass's blocks are tall and narrow, and BLAS threads beside the
worker threads only oversubscribe the cores. Dask's nanny usually sets ``OPENBLAS_NUM_THREADS=1`` in a
worker's environment too, but not for a worker started without one, nor under a configuration that
changes ``distributed.nanny.pre-spawn-environ``; the plugin holds the limit either way.
"""

from __future__ import annotations

from typing import Any, Callable, Sequence

from service.errors import Cancelled


class SerialExecutor:
    """Runs every task here, one after the other, keeping at most log2(tasks) partial results."""

    name = "in-process"

    def map_reduce(self, fn: Callable[[Any], Any], items: Sequence[Any], combine: Callable[[Any, Any], Any], *,
                   on_done: Callable[[], None] | None = None, should_stop: Callable[[], bool] | None = None) -> Any:
        # a binary counter of partial results: a balanced tree in partition order, built incrementally
        stack: list[tuple[int, Any]] = []
        for item in items:
            if should_stop and should_stop():
                raise Cancelled("the training job was cancelled")
            node = (1, fn(item))
            while stack and stack[-1][0] == node[0]:
                size, left = stack.pop()
                node = (size * 2, combine(left, node[1]))
            stack.append(node)
            if on_done:
                on_done()
        if not stack:
            raise ValueError("map_reduce over no items")
        values = [v for _, v in stack]
        acc = values[-1]
        for v in reversed(values[:-1]):
            acc = combine(v, acc)
        return acc

    def close(self) -> None:
        pass


class DaskExecutor:
    """Fans the tasks out on a Dask cluster (``address`` "tcp://host:8786", or "local" for a
    ``distributed.LocalCluster`` with ``workers`` processes on this machine)."""

    def __init__(self, address: str, workers: int = 2):
        from distributed import Client, LocalCluster

        self._cluster = None
        if address == "local":
            self._cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                         dashboard_address=None, silence_logs=40)
            self.client = Client(self._cluster)
        else:
            self.client = Client(address, timeout="10s")
        self.name = f"dask {address}"
        self._plugin = _one_blas_thread()
        self.client.register_plugin(self._plugin)  # every worker, and every worker that joins later

    def map_reduce(self, fn: Callable[[Any], Any], items: Sequence[Any], combine: Callable[[Any, Any], Any], *,
                   on_done: Callable[[], None] | None = None, should_stop: Callable[[], bool] | None = None) -> Any:
        from distributed import as_completed

        futures = self.client.map(fn, list(items), pure=False)
        try:
            for fut in as_completed(futures):
                if fut.status == "error":
                    fut.result()  # raises the task's own exception here
                if on_done:
                    on_done()
                if should_stop and should_stop():
                    raise Cancelled("the training job was cancelled")
            level = list(futures)
            while len(level) > 1:
                nxt = [self.client.submit(combine, level[i], level[i + 1], pure=False)
                       for i in range(0, len(level) - 1, 2)]
                if len(level) % 2:
                    nxt.append(level[-1])
                level = nxt
            return level[0].result()
        except BaseException:
            self.client.cancel(futures)
            raise

    def close(self) -> None:
        if self._cluster is None:  # a shared cluster: its workers' BLAS limits go back to what they were
            try:
                self.client.unregister_worker_plugin(self._plugin.name)
            except Exception:  # a cluster gone or unreachable by now: nothing left to restore
                pass
        self.client.close()
        if self._cluster is not None:
            self._cluster.close()


def _one_blas_thread():
    """A Dask worker plugin that holds the worker process's BLAS and OpenMP pools to one thread (restored
    when the plugin is removed or the worker closes)."""
    from distributed import WorkerPlugin

    class OneBlasThread(WorkerPlugin):
        name = "tikhon-one-blas-thread"

        def setup(self, worker) -> None:  # noqa: ARG002
            from threadpoolctl import threadpool_limits

            self._limits = threadpool_limits(limits=1)

        def teardown(self, worker) -> None:  # noqa: ARG002
            limits = getattr(self, "_limits", None)
            if limits is not None:
                limits.restore_original_limits()

    return OneBlasThread()


def make_executor(scheduler: str | None) -> SerialExecutor | DaskExecutor:
    return DaskExecutor(scheduler) if scheduler else SerialExecutor()
