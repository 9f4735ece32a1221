"""The training worker: claims jobs from the catalog, trains each in its own process, publishes the result.

One job at a time per ``Worker``. Each job runs in a fresh process (``multiprocessing`` with the
*spawn* start method), so:

* the server's event loop and threads never carry the CPU work;
* a cancelled or over-time job is stopped for sure: first cooperatively (the engine's ``should_stop``
  is checked after every basis setting), then, after ``cancel_grace_s``, by killing the process;
* a crash of the training (out of memory, a native fault) fails that job with a clear problem instead
  of taking the worker down.

While the process runs, the worker sends a heartbeat with the progress (done and total units, a unit
being one basis setting × fold) every ``worker_heartbeat_s``. The heartbeat answer tells it when the job
was cancelled; a ``Conflict`` tells it the job was taken away (its heartbeat came too late), and the
work is dropped without recording anything. Jobs of a worker that died are put back in the queue by
``requeue_stale``, which every worker calls on a timer (``requeue_period``: a quarter of
``worker_stale_s``, at most 5 s), busy or idle, and failed after ``max_attempts`` claims. A re-run
whose earlier attempt had already published (its worker died between publishing and recording the
result) completes with that version instead of training again, so no version is left that no job claims.

Out-of-core jobs (the request carries ``stream``, the resolved path of a large ``source`` file or a
folder of Parquet files) are read by the training process itself, in row batches
(``service.engine.streaming``), in that process or, with ``TIKHON_DASK_SCHEDULER``, on a Dask cluster;
``if_better`` then scores the live version on the streamed rows per hash fold.

Promotion (``promote`` in the request):

* ``always``: the new version goes live. ``never``: it is only published.
* ``if_better``: the new version goes live only if its cross-validated error beats the live version's
  error **on the new data** by at least ``min_improvement``. The live version's figure is computed by
  predicting the new rows with the live model as stored (it never saw them, so this is an honest
  out-of-sample figure) and scoring the predictions with the same metric, per fold of the new job's
  fold assignment, averaged over folds: the same aggregation as the new version's CV mean. For
  ``rmse`` and ``mae`` lower is better, for ``r2`` higher. The new version must improve strictly, by
  at least ``min_improvement`` (in the metric's units). When the live model cannot score the new rows
  (a column it needs is missing, say) the comparison is impossible and the new version does not go
  live; the job records why. Both figures, the metric and the decision are stored in the job's
  ``decision`` and, when the version goes live, in the history entry.
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import math
import multiprocessing as mp
import os
import signal
import socket
import threading
import time
import traceback
import uuid
from typing import Any

import numpy as np

from service.lifeline import TRAINING_NICENESS, die_with_parent, lower_priority  # noqa: F401 (TRAINING_NICENESS: read by the tests)
from service.errors import (
    BudgetExceeded,
    CatalogUnavailable,
    Cancelled,
    Conflict,
    JobTaken,
    NotFound,
    StorageFailure,
    TikhonError,
)
from service.settings import Settings

log = logging.getLogger("tikhon.worker")

_SPAWN = mp.get_context("spawn")


# ----------------------------------------------------------------------------------------------------
# the training process


def _problem(err: BaseException) -> dict[str, Any]:
    from service.problems import internal_error_body, problem_from_error

    if isinstance(err, TikhonError):
        return problem_from_error(err)
    body = internal_error_body(None, None)
    body["detail"] = (f"Training failed unexpectedly ({type(err).__name__}: {' '.join(str(err).split())[:300]}); "
                      "the worker log holds the traceback. Report it with the job id.")
    return body


# Progress between the engine's own reports. The engine reports after each row block and each split of a
# basis setting, but one block or one split's factorization of a wide basis is a single LAPACK call that can
# outlast several heartbeats. So a heartbeat that finds no new report shows one sub-unit more than the last
# one did (a job under the worker counts ``tune.PACED_STEPS`` = 1,000 sub-units per basis setting x split),
# never reaching the end of the setting under way (``tune``'s ``progress_span``): the setting's end, and
# everything after it, is reported by the engine only. The nudge is the smallest step there is, so the
# figure stays the engine's own to within a few thousandths, and it can keep moving for at least 1,000
# heartbeats without a report (83 minutes at the default 5 s).
def paced(shown: int, done: int, span_end: int) -> int:
    """What a heartbeat reports: the engine's ``done`` once it passed what was ``shown``; else ``shown + 1``
    while that stays below ``span_end`` (the end of the setting under way; 0: no setting under way)."""
    if done > shown:
        return done
    return shown + 1 if shown + 1 < span_end else shown


def stream_partitions(request: dict, data_dir, spec=None) -> tuple[dict[str, str], list] | None:
    """(schema, partitions) of a streamed job: exactly the files fixed at submission (``request["files"]``),
    each re-checked when opened (``service.filelist``); a job queued by an older version names only its
    source path (``stream``) and is listed now. None for a job whose data was staged."""
    from service.filelist import refs_from_job
    from service.sources import open_files, open_source

    if request.get("files"):
        return open_files(refs_from_job(data_dir, request["files"]), spec)
    if request.get("stream"):
        return open_source(request["stream"], spec)
    return None


def job_table(request: dict, data_path: str | None, data_dir, limits: dict | None = None) -> dict[str, np.ndarray]:
    """The table of an in-memory job: a file the API process only looked at (``request["read"]``: an upload
    staged as sent, or the ``source`` file fixed in ``request["files"]``), read whole here and checked as at
    submission (``tables.read_for_job``); else the table the API process staged as Parquet."""
    import types

    from service import tables

    if not request.get("read"):
        return tables.read_staged(data_path)
    if request.get("files"):
        from service.filelist import refs_from_job

        raw = refs_from_job(data_dir, request["files"])[0].open  # re-checked: the file as it was at submission
    else:
        def raw():
            return open(data_path, "rb")
    return tables.read_for_job(request["read"], raw, request["spec"],
                               None if limits is None else types.SimpleNamespace(**limits))


def _train(data_path: str | None, spec: dict, conn, progress, cancel, deadline: float,
           stream: dict | None = None, dask_scheduler: str | None = None, dask_workers: int = 2,
           limits: dict | None = None, parent_pid: int | None = None, data_dir: str | None = None,
           continuation: dict | None = None, read: dict | None = None,
           live: tuple[int, Any] | None = None, scratch: dict | None = None) -> None:
    """Body of the training process: read the staged table (or stream the source), tune, send the
    artifact back through ``conn``. ``scratch`` (a streamed job in this process): ``{"folder", "limit"}`` of
    the scanned-column cache (``service.scancache``), whose files are removed here when the training ends."""
    if parent_pid is not None:
        die_with_parent(parent_pid)
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent decides when this process stops
    lower_priority()
    try:
        def on_progress(done: int, total: int) -> None:
            progress[0], progress[1] = int(done), int(total)

        def on_span(start: int, end: int) -> None:  # the basis setting under way (see paced)
            progress[2], progress[3] = int(start), int(end)

        def should_stop() -> bool:
            return cancel.is_set() or time.time() > deadline

        if stream is not None:
            from service.engine.executors import DaskExecutor, SerialExecutor
            from service.engine.streaming import tune_partitions
            from service.engine.tune import Budget
            from service.sources import CsvPart

            schema, parts = stream_partitions(stream, data_dir, spec)
            # a CSV's whole content is hashed once here; every pass then re-hashes what it parses
            parts = [dataclasses.replace(p, ref=p.ref.with_content_digest()) if isinstance(p, CsvPart) else p
                     for p in parts]
            if dask_scheduler == "local":
                # The worker starts this process as a daemon (so it ends with the worker), and a daemonic
                # process may not start children; a LocalCluster's worker processes are children. Clearing
                # the flag here, in the child, changes nothing on the parent's side (it still stops this
                # process at exit), and Dask's own worker processes exit as soon as this one is gone
                # (distributed.process watches its parent through a pipe).
                mp.current_process().daemon = False
            executor = DaskExecutor(dask_scheduler, dask_workers) if dask_scheduler else SerialExecutor()
            cache = None
            held = contextlib.ExitStack()
            if scratch is not None and not dask_scheduler:  # later passes read what the scan decoded
                from pathlib import Path

                from service.scancache import ScanCache
                from service.store.scratch import share

                try:  # the folder stays busy while this process lives, even if its worker dies first
                    folder = held.enter_context(share(Path(scratch["folder"])))
                except OSError:
                    folder = None
                if folder is not None:
                    cache = ScanCache(folder, int(scratch["limit"]))
                    parts = cache.wrap(parts)
            try:  # the server's limits (max_levels: checked while the rows are scanned)
                result = tune_partitions(parts, schema, spec, executor=executor, progress=on_progress,
                                         should_stop=should_stop, budget=Budget(**(limits or {})))
            finally:
                executor.close()
                if cache is not None:
                    log.info("scanned-column cache", extra={"reads": dict(cache.reads), "cached_bytes": cache.used,
                                                            "limit_bytes": cache.limit})
                    cache.close()
                held.close()
        elif continuation is not None:  # only the new rows, merged into the parent's per-fold summaries
            from service.tables import read_staged
            from service.engine.continued import continue_tune
            from service.engine.tune import Budget

            budget = Budget(**(limits or {}))
            cols = read_staged(data_path)  # the new rows only
            result = continue_tune(continuation["body"], continuation["arrays"], cols,
                                   old_weight=continuation["old_weight"], progress=on_progress,
                                   should_stop=should_stop, budget=budget, version_label=continuation["label"],
                                   max_summary_bytes=budget.max_summary_bytes)
            result.lineage = {"parent_version": continuation["version"], **(result.lineage or {})}
        else:
            from service.engine import tune

            from service.engine.tune import Budget

            cols = job_table({"spec": spec, **(read or {})}, data_path, data_dir, limits)
            result = tune(cols, spec, progress=on_progress, should_stop=should_stop, budget=Budget(**(limits or {})),
                          progress_span=on_span)
        body, arrays = result.to_artifact()
        fold_of_row = np.asarray(result.fold_of_row)
        if fold_of_row.ndim == 1 and fold_of_row.dtype.kind in "iu":  # sent to the worker: the smallest integer type
            fold_of_row = (fold_of_row.astype(np.min_scalar_type(int(fold_of_row.max())))
                           if fold_of_row.size and fold_of_row.min() >= 0 else fold_of_row)
        else:
            fold_of_row = None
        outcome = {"metric": result.summary.get("metric"), "cv_mean": float(result.summary.get("mean")),
                   "fold_of_row": fold_of_row, "target": result.spec.target}
        if live is not None and stream is None:  # if_better: the live version scored here, on the rows read here
            version, model = live
            try:
                outcome["live_scored"] = {"version": version, "score": score_on(
                    model, cols, outcome["target"], outcome["metric"], fold_of_row)}
            except TikhonError as err:
                outcome["live_scored"] = {"version": version, "error": err}
            del cols
        conn.send(("ok", body, arrays, outcome))
    except Cancelled as err:
        conn.send(("cancelled", _problem(err)))
    except BaseException as err:  # everything goes back to the parent as a problem object
        if not isinstance(err, TikhonError):
            traceback.print_exc()
        conn.send(("error", _problem(err)))
    finally:
        conn.close()


# ----------------------------------------------------------------------------------------------------
# scoring the live version on the new data (if_better)


def score_on(model: Any, cols: dict[str, np.ndarray], target: str, metric: str, fold_of_row: np.ndarray | None) -> float:
    """``model``'s error on the rows of ``cols``: the metric per fold of ``fold_of_row``, averaged over folds
    (the aggregation of a CV mean); over all rows at once when no usable fold assignment is given."""
    from service.engine.result import metric_of_rows  # the engine's one metric function (no fallback)

    y = np.asarray(cols[target], dtype=np.float64)
    inputs = {k: v for k, v in cols.items() if k != target}
    pred = np.asarray(model.predict(inputs), dtype=np.float64)
    if fold_of_row is not None and fold_of_row.shape == y.shape:
        ids = np.unique(fold_of_row)
        if 2 <= ids.size <= 100 and all((fold_of_row == k).sum() >= 2 for k in ids):
            return float(np.mean([metric_of_rows(metric, y[fold_of_row == k], pred[fold_of_row == k]) for k in ids]))
    return metric_of_rows(metric, y, pred)


def decide(store, name: str, request: dict, outcome: dict, data_path: str | None, data_dir=None
           ) -> tuple[bool, dict[str, Any]]:
    """Whether the new version goes live, and the record of why (see the module docstring)."""
    promote = request.get("promote", "if_better")
    metric = outcome["metric"]
    new = outcome["cv_mean"]
    decision: dict[str, Any] = {"promote": promote, "metric": metric, "new_cv_mean": new}
    if promote == "never":
        return False, {**decision, "went_live": False, "reason": "promote is 'never': the version was only published"}
    live = store.live_version(name)
    decision["live_version"] = live
    if live is None:
        return True, {**decision, "went_live": True, "reason": "the model had no live version"}
    if promote == "always":
        return True, {**decision, "went_live": True, "reason": "promote is 'always'"}
    min_improvement = float(request.get("min_improvement") or 0.0)
    decision["min_improvement"] = min_improvement
    decision["comparison"] = ("live version's predictions on the new rows, scored per fold of the new job's folds "
                              "and averaged; the new version's figure is its CV mean")
    try:
        scored = outcome.get("live_scored")
        if scored is not None and scored.get("version") == live:  # scored by the training process
            if "error" in scored:
                raise scored["error"]
            live_score = scored["score"]
        elif (request.get("files") or request.get("stream")) and not request.get("read"):  # out of core: streamed rows
            from service.engine.streaming import score_partitions

            live_score = score_partitions(store.load(name, live).model, stream_partitions(request, data_dir, request["spec"])[1],
                                          request["spec"], metric)
            decision["comparison"] = ("live version's predictions on the new rows, scored per hash fold of the new "
                                      "job's spec and averaged; the new version's figure is its CV mean")
        else:
            live_model = store.load(name, live).model  # not scored in training: live changed meanwhile, or a resume
            cols = job_table(request, data_path, data_dir)  # read as when the job trained
            live_score = score_on(live_model, cols, outcome["target"], metric, outcome.get("fold_of_row"))
    except TikhonError as err:
        return False, {**decision, "went_live": False, "live_on_new_data": None,
                       "reason": f"the live version {live} cannot score the new data ({err}); the new version was "
                                 "published but not made live; use promote 'always' or PUT /v1/models/{name}/live"}
    decision["live_on_new_data"] = live_score
    if not math.isfinite(live_score):
        return False, {**decision, "went_live": False, "reason": "the live version's figure is not finite"}
    improvement = (new - live_score) if metric == "r2" else (live_score - new)
    decision["improvement"] = improvement
    better = improvement > 0 and improvement >= min_improvement
    verb = "beats" if better else "does not beat"
    reason = (f"new {metric} {new:.6g} {verb} the live version {live}'s {live_score:.6g} on the new data by at least "
              f"{min_improvement:g} (improvement {improvement:.6g})")
    return better, {**decision, "went_live": better, "reason": reason}


# ----------------------------------------------------------------------------------------------------
# logging a catalog outage


class OutageLog:
    """How a worker reports a catalog it cannot reach: the first failure once, at error level, with what
    failed (a traceback only for an unexpected error); then one summary line at growing intervals
    (``first_summary_s``, doubling up to ``max_summary_s``) with the count of failed attempts and the last
    message; and one line when the catalog answers again, saying how long it was gone. Thread-safe (the
    job loop and the re-queue timer share one)."""

    def __init__(self, logger: logging.Logger, worker_id: str, *, first_summary_s: float = 5.0,
                 max_summary_s: float = 300.0, clock=time.monotonic):
        self._log = logger
        self._worker_id = worker_id
        self._first = float(first_summary_s)
        self._max = float(max_summary_s)
        self._clock = clock
        self._lock = threading.Lock()
        self._since: float | None = None
        self._failures = 0
        self._unreported = 0
        self._next = 0.0
        self._gap = self._first
        self._last = ""

    @property
    def down(self) -> bool:
        return self._since is not None

    @property
    def failures(self) -> int:
        return self._failures

    def failed(self, what: str, exc: BaseException) -> None:
        message = " ".join(str(exc).split())[:500] or type(exc).__name__
        now = self._clock()
        with self._lock:
            self._failures += 1
            self._last = f"{what}: {message}"
            if self._since is None:
                self._since, self._unreported, self._gap = now, 0, self._first
                self._next = now + self._gap
                first = True
            else:
                self._unreported += 1
                first = False
                due = now >= self._next
                if due:
                    count, self._unreported = self._unreported, 0
                    self._gap = min(self._gap * 2, self._max)
                    self._next = now + self._gap
                    down_for = now - self._since
        extra = {"worker_id": self._worker_id}
        if first:
            kind = "catalog unavailable" if isinstance(exc, StorageFailure) else "worker loop error"
            self._log.error("%s, retrying with back-off: %s: %s", kind, what, message, extra=extra,
                            exc_info=None if isinstance(exc, TikhonError) else exc)
        elif due:
            self._log.warning("catalog still unavailable after %.0f s: %d more failed attempts; last: %s",
                              down_for, count, self._last, extra=extra)

    def ok(self) -> None:
        if self._since is None:  # the common case: no lock, nothing to say
            return
        now = self._clock()
        with self._lock:
            if self._since is None:
                return
            down_for, failures = now - self._since, self._failures
            self._since, self._failures, self._unreported = None, 0, 0
        self._log.warning("catalog available again after %.1f s (%d failed attempts)", down_for, failures,
                          extra={"worker_id": self._worker_id})

    def retry_delay(self, base_s: float, cap_s: float = 5.0) -> float:
        """Pause before the next attempt: ``base_s`` normally; while the catalog is down, doubling with the
        number of failures up to ``max(base_s, cap_s)``."""
        if self._since is None:
            return base_s
        return min(base_s * 2 ** min(self._failures, 16), max(base_s, cap_s))


def requeue_period(stale_s: float) -> float:
    """How often every worker looks for stale jobs: a quarter of ``worker_stale_s``, at most 5 s, so a job
    whose worker died is re-queued between ``stale_s`` and ``stale_s + requeue_period`` after its last
    heartbeat, whether the other workers are idle or busy."""
    return max(0.05, min(stale_s / 4.0, 5.0))


# ----------------------------------------------------------------------------------------------------
# the worker


class Worker:
    """Claims and runs training jobs. ``run_forever(stop)`` loops until ``stop`` is set; ``start()`` does
    that in a background thread (the embedded worker of ``tikhon serve``)."""

    def __init__(self, settings: Settings, store, *, worker_id: str | None = None, on_live_change=None):
        self.settings = settings
        self.store = store
        self.worker_id = worker_id or f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
        self.on_live_change = on_live_change
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._proc = None
        self._last_requeue = 0.0
        self._requeue_lock = threading.Lock()
        self.outage = OutageLog(log, self.worker_id)

    # -- lifecycle ----------------------------------------------------------------------------------
    def start(self) -> "Worker":
        self._thread = threading.Thread(target=self.run_forever, name="tikhon-worker", daemon=True)
        self._thread.start()
        return self

    def stop(self, timeout: float = 30.0) -> None:
        """Stop claiming; a job in progress is stopped (its process killed) and left for re-queueing."""
        self._stop.set()
        proc = self._proc
        if proc is not None and proc.is_alive():
            proc.kill()
        if self._thread is not None:
            self._thread.join(timeout)

    def run_forever(self, stop: threading.Event | None = None) -> None:
        stop = stop or self._stop
        log.info("worker started", extra={"worker_id": self.worker_id})
        timer = threading.Thread(target=self._requeue_timer, args=(stop,), name="tikhon-requeue", daemon=True)
        timer.start()
        while not (stop.is_set() or self._stop.is_set()):
            try:
                ran = self.run_once()
            except Exception as exc:  # a catalog outage must not end the loop; it is logged (with back-off) and retried
                self.outage.failed("polling the catalog for training jobs", exc)
                ran = False
            if not ran:
                stop.wait(self.outage.retry_delay(self.settings.worker_poll_s))
        timer.join(5)
        log.info("worker stopped", extra={"worker_id": self.worker_id})

    def _requeue_timer(self, stop: threading.Event) -> None:
        """Every ``requeue_period``, busy or idle: put back the jobs of workers that stopped beating."""
        period = requeue_period(self.settings.worker_stale_s)
        while not stop.wait(period) and not self._stop.is_set():
            try:
                self.requeue_due()
            except Exception as exc:
                self.outage.failed("re-queueing stale training jobs", exc)

    def requeue_due(self) -> None:
        """Re-queue stale jobs unless this worker did so less than ``requeue_period`` ago."""
        with self._requeue_lock:
            now = time.monotonic()
            if now - self._last_requeue < requeue_period(self.settings.worker_stale_s):
                return
            self._last_requeue = now
            handled = self.store.jobs.requeue_stale(self.settings.worker_stale_s, self.settings.max_attempts,
                                                    caller=self.worker_id)
        self.outage.ok()
        for job in handled:
            log.warning("stale job handled", extra={"job_id": job["id"], "state": job["state"]})

    def run_once(self) -> bool:
        """Re-queue stale jobs (when due), claim one job and run it. Returns whether a job ran."""
        self.requeue_due()
        job = self.store.jobs.claim(self.worker_id)
        self.outage.ok()
        if job is None:
            return False
        self.run_job(job)
        return True

    # -- one job ------------------------------------------------------------------------------------
    def run_job(self, job: dict[str, Any]) -> None:
        jid, name = job["id"], job["name"]
        request = job["request"] or {}
        s = self.settings
        log.info("job started", extra={"job_id": jid, "model": name, "attempt": job.get("attempts")})
        if (job.get("attempts") or 1) > 1:  # a re-run: an earlier attempt may have published before dying
            published = self._published_by(name, jid)
            if published is not None:
                self._resume(job, published)
                return
        read = {k: request[k] for k in ("read", "files") if request.get(k)} if request.get("read") else None
        stream = None if read else ({k: request[k] for k in ("files", "stream") if request.get(k)} or None)
        if not job.get("data_path") and not stream and not (read and read.get("files")):
            self._finish(jid, "failed", problem=_problem(TikhonError(
                "the job has no staged data file; submit it again through POST /v1/models/{name}/trainings.")))
            return
        continuation = None
        if request.get("continue_from") is not None:  # the parent's body and arrays, verified by their checksums
            version = int(request["continue_from"])
            try:
                body, arrays = self._retrying(f"reading version {version} of {name!r} for job {jid}",
                                              lambda: self.store.load_parts(name, version))
            except TikhonError as err:
                self._finish(jid, "failed", problem=_problem(err))
                return
            continuation = {"body": body, "arrays": arrays, "version": version,
                            "old_weight": float(request.get("old_weight") or 1.0),
                            "label": f"version {version} of {name!r}"}
        parent_conn, child_conn = _SPAWN.Pipe(duplex=False)
        progress = _SPAWN.Array("q", 4, lock=False)  # done, total, and the span of the basis setting under way
        cancel = _SPAWN.Event()
        started = time.time()
        deadline = started + s.max_training_seconds
        scratch_held = contextlib.ExitStack()  # the job's scratch folder, removed once its process has ended
        try:
            proc = _SPAWN.Process(
                target=_train, args=(job.get("data_path"), request["spec"], child_conn, progress, cancel, deadline,
                                     stream, s.dask_scheduler, s.dask_local_workers,
                                     {"max_grid_fits": s.max_grid_fits, "max_levels": s.max_levels,
                                      "max_job_cost": s.max_job_cost, "max_summary_bytes": s.max_summary_bytes},
                                     os.getpid(), str(s.data_dir), continuation, read,
                                     None if stream else self._live_model(name, request),
                                     self._scratch(scratch_held, jid, stream)),
                name=f"tikhon-train-{jid[:8]}", daemon=True,
            )
            proc.start()
        except BaseException:
            scratch_held.close()
            raise
        child_conn.close()
        self._proc = proc
        message = None
        stop_reason: str | None = None  # "cancelled" | "timeout" | "lost" | "shutdown"
        stop_since = 0.0
        last_beat = 0.0
        shown = 0  # the progress the last heartbeat reported
        try:
            while True:
                if parent_conn.poll(min(0.1, s.worker_heartbeat_s)):
                    try:
                        message = parent_conn.recv()
                    except EOFError:
                        message = None
                    break
                if not proc.is_alive():
                    break
                now = time.time()
                if self._stop.is_set() and stop_reason is None:
                    stop_reason, stop_since = "shutdown", now
                    proc.kill()
                    break
                if now - last_beat >= s.worker_heartbeat_s:
                    last_beat = now
                    shown = paced(shown, progress[0], progress[3])
                    try:
                        state = self.store.jobs.heartbeat(jid, self.worker_id, {"done": shown, "total": progress[1] or None})
                    except Conflict:
                        stop_reason = "lost"
                        proc.kill()
                        break
                    except TikhonError as exc:
                        state = "running"  # a missed heartbeat is retried next round; the stale timeout is generous
                        self.outage.failed(f"recording a heartbeat of job {jid}", exc)
                    else:
                        self.outage.ok()
                    if state == "cancelled" and stop_reason is None:
                        stop_reason, stop_since = "cancelled", now
                        cancel.set()
                if now > deadline and stop_reason is None:
                    stop_reason, stop_since = "timeout", now
                    cancel.set()
                if stop_reason in ("cancelled", "timeout") and now - stop_since > s.cancel_grace_s:
                    proc.kill()
                    break
        finally:
            proc.join(10)
            if proc.is_alive():
                proc.kill()
                proc.join(5)
            parent_conn.close()
            self._proc = None
            scratch_held.close()

        if stop_reason in ("lost", "shutdown"):
            log.warning("job dropped", extra={"job_id": jid, "reason": stop_reason})
            return
        if stop_reason == "timeout" or (message is None and time.time() > deadline):
            self._finish(jid, "failed", problem=_problem(BudgetExceeded(
                f"the training job ran longer than the limit max_training_seconds={s.max_training_seconds:g} and was "
                "stopped; use a smaller grid (fewer strengths, degrees, widths or folds) or fewer rows, or raise "
                "TIKHON_MAX_TRAINING_SECONDS.", limit="max_training_seconds", allowed=s.max_training_seconds)))
            return
        if stop_reason == "cancelled" or (message is not None and message[0] == "cancelled"):
            self._finish(jid, "cancelled")
            return
        if message is None:
            code = proc.exitcode
            how = f"signal {-code}" if code is not None and code < 0 else f"exit code {code}"
            self._finish(jid, "failed", problem=_problem(TikhonError(
                f"the training process ended without a result ({how}); the most common cause is running out of memory: "
                "train on fewer rows or a narrower basis.")))
            return
        if message[0] == "error":
            self._finish(jid, "failed", problem=message[1])
            return
        _, body, arrays, outcome = message
        try:  # record the final progress (the last heartbeat may predate the end of the search)
            self.store.jobs.heartbeat(jid, self.worker_id, {"done": progress[0], "total": progress[1] or None})
        except Conflict:
            log.warning("job dropped", extra={"job_id": jid, "reason": "lost before publishing"})
            return
        except TikhonError:
            pass
        self._publish(job, body, arrays, outcome)

    def _scratch(self, held: contextlib.ExitStack, jid: str, stream: dict | None) -> dict | None:
        """The scanned-column cache of a streamed job trained in its own process: a scratch folder under the
        store (``service.store.scratch``), held by ``held`` until the job's process has ended, and the byte
        limit (``scan_cache_bytes``). None (no cache) for other jobs, on Dask, with the limit 0, or when the
        folder cannot be made (a full or read-only store: the job then decodes its source on every pass)."""
        s = self.settings
        root = getattr(self.store, "root", None)
        if stream is None or s.dask_scheduler or s.scan_cache_bytes <= 0 or root is None:
            return None
        from service.store.scratch import job_scratch

        try:
            folder = held.enter_context(job_scratch(root, jid))
        except OSError as exc:
            log.warning("no scanned-column cache: the job's scratch folder could not be made",
                        extra={"job_id": jid, "reason": exc.strerror or type(exc).__name__})
            return None
        return {"folder": str(folder), "limit": s.scan_cache_bytes}

    def _live_model(self, name: str, request: dict[str, Any]) -> tuple[int, Any] | None:
        """(version, model) of the live version when the job's promotion compares with it (``if_better``): the
        training process scores it on the rows it read, so this process never reads them. None when there is
        nothing to compare, or the model cannot be loaded (``decide`` then says why)."""
        if request.get("promote", "if_better") != "if_better":
            return None
        try:
            live = self.store.live_version(name)
            return None if live is None else (live, self.store.load(name, live).model)
        except TikhonError:
            return None

    def _publish(self, job: dict[str, Any], body: dict, arrays: dict, outcome: dict) -> None:
        jid, name = job["id"], job["name"]
        request = job["request"] or {}
        try:
            go_live, decision = self._retrying(f"deciding the promotion of job {jid}", lambda: decide(
                self.store, name, request, outcome, job.get("data_path"), self.settings.data_dir))
            row = self._retrying(f"publishing the result of job {jid}", lambda: self.store.publish(
                name, body, arrays, job_id=jid, holder=self.worker_id))
            version = int(row["version"])
            decision["version"] = version
            if go_live:
                self._retrying(f"making version {version} of {name!r} live", lambda: self._go_live(
                    name, version, job, decision))
            else:
                self._retrying(f"recording why version {version} of {name!r} did not go live",
                               lambda: self._record_not_live(name, version, job, decision))
        except JobTaken as err:  # the job was taken away (re-queued) before the publish: its new holder decides
            log.warning("job dropped", extra={"job_id": jid, "reason": f"not published: {err}"})
            return
        except CatalogUnavailable:  # stopping while the catalog is down: the job is re-queued later
            log.warning("job dropped", extra={"job_id": jid, "reason": "stopping while the catalog is unavailable"})
            return
        except TikhonError as err:
            self._finish(jid, "failed", problem=_problem(err))
            return
        self._finish(jid, "succeeded", version=version, decision=decision)
        log.info("job succeeded", extra={"job_id": jid, "model": name, "version": version,
                                       "went_live": decision.get("went_live")})

    def _go_live(self, name: str, version: int, job: dict[str, Any], decision: dict[str, Any]) -> None:
        """Make ``version`` live with the job's decision as the history entry's reason and details, unless
        the live version changed after the job was submitted: an operator's later change stands, the
        history says why, and ``decision`` is updated to say the version did not go live."""
        jid = job["id"]
        seen = job.get("live_at_submit")
        condition = {"expect_live": seen.get("version")} if isinstance(seen, dict) else {}
        entry = self.store.set_live(name, version, actor=f"worker:{self.worker_id}"[:200],
                                    reason=f"training job {jid}: {decision['reason']}",
                                    details={k: v for k, v in decision.items() if k != "comparison"} | {"job_id": jid},
                                    **condition)
        if entry.get("superseded"):
            decision.update(went_live=False, reason=entry["because"],
                            live_seen=entry["details"]["live_seen"], live_now=entry["details"]["live_now"])
            return
        if self.on_live_change is not None:
            self.on_live_change(name)

    def _record_not_live(self, name: str, version: int, job: dict[str, Any], decision: dict[str, Any]) -> None:
        """Put a decision not to make ``version`` live into the model's history, so every retrain's outcome is
        read in one place (the live version is unchanged)."""
        jid = job["id"]
        self.store.record_decision(name, version, actor=f"worker:{self.worker_id}"[:200],
                                   reason=f"training job {jid}: {decision['reason']}",
                                   details={k: v for k, v in decision.items() if k != "comparison"} | {"job_id": jid})

    def _published_by(self, name: str, jid: str) -> int | None:
        """The version an earlier attempt of job ``jid`` published, if any (versions record their job)."""
        try:
            rows = self.store.list_versions(name)
        except NotFound:
            return None
        return next((int(r["version"]) for r in rows if r.get("job_id") == jid), None)

    def _resume(self, job: dict[str, Any], version: int) -> None:
        """Finish a job whose earlier attempt published ``version`` and then lost its worker (between the
        publish and the job's "succeeded"). Training again would leave ``version`` behind as an orphan that
        no job claims, so the job completes with it: the promotion is decided now unless it already
        happened (the version, or a newer one, is live)."""
        jid, name = job["id"], job["name"]
        request = job["request"] or {}
        note = f"resumed: an earlier attempt published version {version} and its worker was lost before recording it"
        try:
            live = self.store.live_version(name)
            if live is not None and live >= version:
                went = live == version
                decision = {"promote": request.get("promote"), "version": version, "went_live": went, "resumed": True,
                            "reason": f"{note}; " + ("it had already gone live" if went else
                                                     f"the newer version {live} is live and stays live")}
            else:
                body = self.store.get_manifest(name, version, cv_table=False).get("training") or {}
                summary = body.get("cv_summary") or {}
                outcome = {"metric": summary.get("metric"), "cv_mean": float(summary.get("mean")), "fold_of_row": None,
                           "target": (body.get("spec") or {}).get("target")}
                go_live, decision = decide(self.store, name, request, outcome, job.get("data_path"),
                                           self.settings.data_dir)
                decision.update(version=version, resumed=True, reason=f"{note}; {decision['reason']}")
                if go_live:
                    self._go_live(name, version, job, decision)
                else:
                    self._record_not_live(name, version, job, decision)
        except TikhonError as err:
            self._finish(jid, "failed", problem=_problem(err))
            return
        self._finish(jid, "succeeded", version=version, decision=decision)
        log.info("job resumed", extra={"job_id": jid, "model": name, "version": version})

    def _retrying(self, what: str, fn):
        """``fn()``; while the catalog is unavailable, retried with back-off rather than failing the job (a
        trained result is not thrown away for a database restart). Safe to repeat: a publish commits only
        while this worker holds the job. When the worker is told to stop meanwhile, the error is raised and
        the job is left for re-queueing."""
        while True:
            try:
                out = fn()
            except CatalogUnavailable as exc:
                self.outage.failed(what, exc)
                if self._stop.wait(self.outage.retry_delay(self.settings.worker_poll_s)):
                    raise
                continue
            self.outage.ok()
            return out

    def _finish(self, jid: str, state: str, **kw: Any) -> None:
        try:
            self._retrying(f"recording the end of job {jid}", lambda: self.store.jobs.finish(jid, self.worker_id, state, **kw))
        except Conflict as err:
            log.warning("job result not recorded", extra={"job_id": jid, "reason": str(err)})
        if state != "succeeded":
            log.info("job ended", extra={"job_id": jid, "state": state})


def run_worker(settings: Settings) -> None:
    """Entry point of ``tikhon worker``: a standalone worker until SIGTERM or SIGINT."""
    from service.logs import configure
    from service.store import Store

    configure(settings.log_level)
    store = Store(settings)
    worker = Worker(settings, store)
    stop = threading.Event()

    def on_signal(signum, frame):  # noqa: ARG001
        stop.set()
        worker.stop(timeout=0)

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    try:
        worker.run_forever(stop)
    finally:
        store.close()
