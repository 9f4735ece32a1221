"""The worker through a catalog outage and beside dead workers: back-off logging, the re-queue timer.

* ``OutageLog``: one error line for the first failure, then summaries at doubling intervals, then one
  line when the catalog answers again (checked with a hand-driven clock and a real logger).
* A worker that stays busy with a job of its own still re-queues a job whose worker stopped beating,
  within ``worker_stale_s + requeue_period`` of that job's last heartbeat.
* A real worker loop against a catalog that refuses connections for a while logs a handful of lines,
  not one traceback per poll, and says when the catalog is back.
"""

from __future__ import annotations

import logging
import socket
import threading
import time
from datetime import timedelta

import pytest
import sqlalchemy as sa

from service.errors import CatalogUnavailable
from service.settings import Settings
from service.store import Store
from service.store.schema import jobs as jobs_t
from service.worker import OutageLog, Worker, requeue_period


class _Lines(logging.Handler):
    def __init__(self):
        super().__init__(logging.DEBUG)
        self.records: list[logging.LogRecord] = []

    def emit(self, record):
        self.records.append(record)


@pytest.fixture
def lines():
    logger = logging.getLogger("tikhon.worker")
    handler = _Lines()
    old = logger.level
    logger.addHandler(handler)
    logger.setLevel(logging.DEBUG)
    try:
        yield handler.records
    finally:
        logger.removeHandler(handler)
        logger.setLevel(old)


def test_outage_log_reports_once_then_summaries_with_back_off_then_recovery(lines):
    now = [0.0]
    out = OutageLog(logging.getLogger("tikhon.worker"), "w1", first_summary_s=5, max_summary_s=40, clock=lambda: now[0])
    down = CatalogUnavailable("claiming failed: the catalog does not answer (connection refused)")
    # A failed attempt every half second for 100 s, as a worker polling at 0.5 s would make.
    for _ in range(200):
        out.failed("claiming a training job", down)
        now[0] += 0.5
    errors = [r for r in lines if r.levelno == logging.ERROR]
    summaries = [r for r in lines if r.levelno == logging.WARNING]
    assert len(errors) == 1 and "catalog unavailable" in errors[0].getMessage()
    assert errors[0].exc_info is None  # an expected outage: no traceback
    # Summaries 5, 15, 35, 75 s after the first failure (gaps 5, 10, 20, 40; the gap is capped at 40).
    assert [r.getMessage().split(" after ")[1].split(" s:")[0] for r in summaries] == ["5", "15", "35", "75"]
    assert "10 more failed attempts" in summaries[0].getMessage()  # at 0.5, 1.0, ..., 5.0 s
    assert "connection refused" in summaries[0].getMessage()
    assert out.down and out.failures == 200
    out.ok()
    back = lines[-1]
    assert back.getMessage() == "catalog available again after 100.0 s (200 failed attempts)"
    assert not out.down
    n = len(lines)
    out.ok()  # nothing more to say
    assert len(lines) == n
    # A later outage starts over with one error line.
    out.failed("claiming a training job", down)
    assert lines[-1].levelno == logging.ERROR


def test_retry_delay_backs_off_while_the_catalog_is_down():
    out = OutageLog(logging.getLogger("tikhon.worker"), "w1", clock=lambda: 0.0)
    assert out.retry_delay(0.5) == 0.5
    delays = []
    for _ in range(6):
        out.failed("x", CatalogUnavailable("down"))
        delays.append(out.retry_delay(0.5))
    assert delays == [1.0, 2.0, 4.0, 5.0, 5.0, 5.0]
    out.ok()
    assert out.retry_delay(0.5) == 0.5


def test_requeue_period_bounds():
    assert requeue_period(30.0) == 5.0  # the default: re-queued 30-35 s after the last heartbeat
    assert requeue_period(8.0) == 2.0
    assert requeue_period(0.1) == 0.05


def _age(store, job_id, seconds):
    with store.db.sql.begin() as conn:
        conn.execute(sa.update(jobs_t).where(jobs_t.c.id == job_id).values(
            heartbeat_at=sa.func.coalesce(jobs_t.c.heartbeat_at, jobs_t.c.created_at)))
        hb = conn.execute(sa.select(jobs_t.c.heartbeat_at).where(jobs_t.c.id == job_id)).scalar()
        conn.execute(sa.update(jobs_t).where(jobs_t.c.id == job_id).values(heartbeat_at=hb - timedelta(seconds=seconds)))


def test_a_busy_worker_still_requeues_a_dead_workers_job(tmp_path):
    settings = Settings(store=tmp_path / "store", data_dir=tmp_path, worker_stale_s=2.0, worker_poll_s=0.05)
    store = Store(settings)
    try:
        mine, _ = store.jobs.submit("m", {"spec": {}})
        busy = threading.Event()
        release = threading.Event()
        worker = Worker(settings, store, worker_id="busy-worker")

        def run_job(job):  # the worker is inside a long job of its own until released
            busy.set()
            release.wait(120)
            worker._finish(job["id"], "cancelled")

        worker.run_job = run_job
        thread = threading.Thread(target=worker.run_forever, daemon=True)
        thread.start()
        assert busy.wait(60)
        orphan, _ = store.jobs.submit("m", {"spec": {}})
        assert store.jobs.claim("dead-worker")["id"] == orphan["id"]
        _age(store, orphan["id"], 60)  # its worker died a minute ago
        deadline = time.monotonic() + 60
        while store.jobs.get(orphan["id"])["state"] != "queued" and time.monotonic() < deadline:
            time.sleep(0.05)
        assert store.jobs.get(orphan["id"])["state"] == "queued"
        assert store.jobs.get(mine["id"])["state"] == "running" and not release.is_set()  # still busy
        release.set()
        worker.stop()
        thread.join(30)
    finally:
        store.close()


def test_worker_loop_logs_an_outage_in_a_few_lines(tmp_path, lines):
    from service.store.catalog import create_catalog_engine

    settings = Settings(store=tmp_path / "store", data_dir=tmp_path, worker_stale_s=2.0, worker_poll_s=0.05)
    store = Store(settings)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    dead = create_catalog_engine(f"postgresql+psycopg://nobody@127.0.0.1:{port}/tikhon")
    real = store.db.sql
    worker = Worker(settings, store, worker_id="w-outage")
    try:
        store.db.sql = dead  # the store, its jobs and keys share one catalog access
        thread = threading.Thread(target=worker.run_forever, daemon=True)
        thread.start()
        deadline = time.monotonic() + 60
        while worker.outage.failures < 8 and time.monotonic() < deadline:
            time.sleep(0.05)
        assert worker.outage.failures >= 8  # it kept retrying
        store.db.sql = real
        while worker.outage.down and time.monotonic() < deadline:
            time.sleep(0.05)
        assert not worker.outage.down
        worker.stop()
        thread.join(30)
    finally:
        store.db.sql = real
        store.close()
        dead.dispose()
    mine = [r for r in lines if getattr(r, "worker_id", None) == "w-outage" and r.levelno >= logging.WARNING]
    errors = [r for r in mine if r.levelno == logging.ERROR]
    assert len(errors) == 1 and errors[0].exc_info is None, [r.getMessage() for r in mine]
    assert "connection refused" in errors[0].getMessage().lower()
    assert mine[-1].getMessage().startswith("catalog available again after")
    assert len(mine) <= 4, [r.getMessage() for r in mine]  # not one line per failed attempt


def test_a_trained_result_waits_for_the_catalog_instead_of_failing(tmp_path, lines):
    """The publish of a finished training meets a catalog outage: it is retried (with back-off) and the
    job succeeds with one version once the catalog answers; before, the job was failed for it."""
    from service.engine import tune

    settings = Settings(store=tmp_path / "store", data_dir=tmp_path, worker_poll_s=0.01)
    store = Store(settings)
    try:
        spec = {"target": "y", "features": ["x"], "bases": [{"kind": "linear"}],
                "penalty": {"kind": "l2", "strengths": {"min": 0.01, "max": 1, "count": 3}},
                "cv": {"scheme": "kfold", "folds": 3, "seed": 1}}
        x = [float(i) for i in range(30)]
        body, arrays = tune({"x": x, "y": [2.0 * v + 1.0 for v in x]}, spec).to_artifact()
        job, _ = store.jobs.submit("m", {"spec": spec, "promote": "never"})
        worker = Worker(settings, store, worker_id="w-wait")
        claimed = store.jobs.claim("w-wait")
        real = store.publish
        refusals = [0]

        def publish(*a, **k):
            if refusals[0] < 3:
                refusals[0] += 1
                raise CatalogUnavailable("publishing failed: the catalog does not answer (connection refused)")
            return real(*a, **k)

        store.publish = publish
        worker._publish(claimed, body, arrays, {"metric": "rmse", "cv_mean": 0.1, "fold_of_row": None, "target": "y"})
        done = store.jobs.get(job["id"])
        assert refusals[0] == 3
        assert done["state"] == "succeeded" and done["version"] == 1
        assert [(v["version"], v["job_id"]) for v in store.list_versions("m")] == [(1, job["id"])]
        said = [r.getMessage() for r in lines if getattr(r, "worker_id", None) == "w-wait" and r.levelno >= logging.WARNING]
        assert len(said) == 2 and said[0].startswith("catalog unavailable") and \
            said[1] == "catalog available again after" + said[1].split("after", 1)[1], said
        assert said[1].endswith("(3 failed attempts)")
    finally:
        store.close()
