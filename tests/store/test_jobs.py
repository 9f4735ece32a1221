"""Training jobs in the catalog: idempotency, claiming, heartbeats, cancel, finish, re-queueing."""

from __future__ import annotations

import time

import pytest
import sqlalchemy as sa

from service.errors import Conflict, InvalidData, InvalidSpec, NotFound
from service.store.schema import jobs as jobs_t


def _age_heartbeat(store, job_id, seconds):
    """Move a job's heartbeat into the past, as if its worker had gone silent that long ago."""
    with store.db.sql.begin() as conn:
        hb = conn.execute(sa.select(jobs_t.c.heartbeat_at).where(jobs_t.c.id == job_id)).scalar()
        from datetime import timedelta
        conn.execute(sa.update(jobs_t).where(jobs_t.c.id == job_id).values(heartbeat_at=hb - timedelta(seconds=seconds)))


def test_submit_get_list(store):
    job, created = store.jobs.submit("m", {"spec": {"target": "y"}, "promote": "never"})
    assert created and job["state"] == "queued" and job["name"] == "m" and job["attempts"] == 0
    assert job["progress"] == {"done": 0, "total": None}
    assert store.jobs.get(job["id"]) == job
    other, _ = store.jobs.submit("n", {"spec": {}})
    assert [j["id"] for j in store.jobs.list()] == [other["id"], job["id"]]  # newest first
    assert [j["id"] for j in store.jobs.list("m")] == [job["id"]]
    assert [j["id"] for j in store.jobs.list(state="queued")] == [other["id"], job["id"]]
    assert store.jobs.counts() == {"queued": 2, "running": 0, "succeeded": 0, "failed": 0, "cancelled": 0}
    with pytest.raises(NotFound):
        store.jobs.get("0" * 32)
    with pytest.raises(NotFound):
        store.jobs.get("../../etc")
    with pytest.raises(InvalidSpec):
        store.jobs.list(state="sleeping")


def test_idempotency_key_returns_the_first_job(store, tmp_path):
    req = {"spec": {"target": "y"}, "promote": "if_better"}
    first, created = store.jobs.submit("m", req, idempotency_key="retrain-2026-05-09")
    again, created_again = store.jobs.submit("m", dict(req), idempotency_key="retrain-2026-05-09")
    assert created and not created_again and again == first
    with pytest.raises(Conflict, match="different request"):
        store.jobs.submit("m", {**req, "promote": "always"}, idempotency_key="retrain-2026-05-09")
    # The key is per model name.
    _, created_other = store.jobs.submit("n", req, idempotency_key="retrain-2026-05-09")
    assert created_other
    assert len(store.jobs.list()) == 2
    for bad in ("", "has space", "x" * 256, "tab\t"):
        with pytest.raises(InvalidSpec, match="Idempotency-Key"):
            store.jobs.submit("m", req, idempotency_key=bad)


def test_data_file_moves_into_the_job_folder_and_goes_when_the_job_ends(store):
    upload = store.jobs.incoming_dir / "upload.csv"
    upload.write_text("x,y\n1,2\n")
    job, _ = store.jobs.submit("m", {"spec": {}}, data_path=upload, idempotency_key="k1")
    assert not upload.exists()
    assert job["data_path"] == str(store.root / "_jobs" / job["id"] / "upload.csv")
    assert open(job["data_path"]).read() == "x,y\n1,2\n"
    # Same key, same request, same data: the first job; the second upload is dropped.
    upload.write_text("x,y\n1,2\n")
    again, created = store.jobs.submit("m", {"spec": {}}, data_path=upload, idempotency_key="k1")
    assert not created and again["id"] == job["id"] and not upload.exists()
    # Same key and request with different data is a different job: refused.
    upload.write_text("x,y\n1,3\n")
    with pytest.raises(Conflict):
        store.jobs.submit("m", {"spec": {}}, data_path=upload, idempotency_key="k1")
    upload.unlink()
    with pytest.raises(InvalidData, match="does not exist"):
        store.jobs.submit("m", {"spec": {}}, data_path=upload)
    claimed = store.jobs.claim("w1")
    store.jobs.finish(claimed["id"], "w1", "succeeded", version=1)
    assert not (store.root / "_jobs" / job["id"]).exists()


def test_claim_heartbeat_finish(store):
    a, _ = store.jobs.submit("m", {"n": 1})
    b, _ = store.jobs.submit("m", {"n": 2})
    got = store.jobs.claim("worker-1")
    assert got["id"] == a["id"] and got["state"] == "running" and got["worker_id"] == "worker-1"
    assert got["attempts"] == 1 and got["started_at"] is not None
    assert store.jobs.heartbeat(a["id"], "worker-1", {"done": 3, "total": 10}) == "running"
    assert store.jobs.get(a["id"])["progress"] == {"done": 3, "total": 10}
    assert store.jobs.heartbeat(a["id"], "worker-1", (4, 10)) == "running"
    with pytest.raises(Conflict, match="no longer held by worker 'intruder'"):
        store.jobs.heartbeat(a["id"], "intruder", None)
    with pytest.raises(Conflict):
        store.jobs.finish(a["id"], "intruder", "succeeded", version=1)
    done = store.jobs.finish(a["id"], "worker-1", "succeeded", version=7,
                             decision={"promote": "if_better", "went_live": True, "new": 0.5, "live": 0.7})
    assert done["state"] == "succeeded" and done["version"] == 7 and done["finished_at"] is not None
    assert done["decision"]["went_live"] is True
    with pytest.raises(Conflict):
        store.jobs.finish(a["id"], "worker-1", "failed")
    with pytest.raises(InvalidSpec):
        store.jobs.finish(b["id"], "worker-1", "paused")
    assert store.jobs.claim("worker-2")["id"] == b["id"]
    assert store.jobs.claim("worker-2") is None
    failed = store.jobs.finish(b["id"], "worker-2", "failed",
                               problem={"type": "invalid-data", "title": "Invalid data", "detail": "NaN in row 3"})
    assert failed["problem"]["detail"] == "NaN in row 3"
    assert store.jobs.counts()["succeeded"] == 1 and store.jobs.counts()["failed"] == 1


def test_cancel(store):
    queued, _ = store.jobs.submit("m", {"n": 1})
    assert store.jobs.cancel(queued["id"])["state"] == "cancelled"
    assert store.jobs.cancel(queued["id"])["state"] == "cancelled"  # idempotent
    assert store.jobs.claim("w") is None  # a cancelled job is never claimed
    running, _ = store.jobs.submit("m", {"n": 2})
    store.jobs.claim("w")
    assert store.jobs.cancel(running["id"])["state"] == "cancelled"
    assert store.jobs.heartbeat(running["id"], "w", (1, 2)) == "cancelled"  # the worker learns it here
    end = store.jobs.finish(running["id"], "w", "cancelled")
    assert end["state"] == "cancelled"
    # A result that arrives after the cancel keeps the state but stays traceable.
    late, _ = store.jobs.submit("m", {"n": 3})
    store.jobs.claim("w")
    store.jobs.cancel(late["id"])
    rec = store.jobs.finish(late["id"], "w", "succeeded", version=4)
    assert rec["state"] == "cancelled" and rec["version"] == 4
    finished, _ = store.jobs.submit("m", {"n": 4})
    store.jobs.claim("w")
    store.jobs.finish(finished["id"], "w", "succeeded", version=5)
    with pytest.raises(Conflict, match="already succeeded"):
        store.jobs.cancel(finished["id"])


def test_requeue_stale_then_fail_after_max_attempts(store):
    job, _ = store.jobs.submit("m", {"n": 1})
    fresh, _ = store.jobs.submit("m", {"n": 2})
    for attempt in (1, 2):
        claimed = store.jobs.claim(f"dead-{attempt}")
        assert claimed["id"] == job["id"] and claimed["attempts"] == attempt
        _age_heartbeat(store, job["id"], 120)
        changed = store.jobs.requeue_stale(30, 3)
        assert [(j["id"], j["state"]) for j in changed] == [(job["id"], "queued")]
        assert changed[0]["worker_id"] is None
        # The dead worker, should it wake up, no longer holds the job.
        with pytest.raises(Conflict):
            store.jobs.heartbeat(job["id"], f"dead-{attempt}", None)
    claimed = store.jobs.claim("dead-3")
    assert claimed["attempts"] == 3
    other = store.jobs.claim("alive")
    assert other["id"] == fresh["id"]
    _age_heartbeat(store, job["id"], 120)
    assert store.jobs.requeue_stale(30, 3)[0]["state"] == "failed"  # third silent worker: give up
    failed = store.jobs.get(job["id"])
    assert failed["problem"]["type"] == "worker-lost" and "3 times" in failed["problem"]["detail"]
    assert store.jobs.get(fresh["id"])["state"] == "running"  # a beating job is never touched
    assert store.jobs.requeue_stale(30, 3) == []


def test_requeue_uses_the_heartbeat_not_the_start(store):
    job, _ = store.jobs.submit("m", {"n": 1})
    store.jobs.claim("w")
    time.sleep(0.05)
    assert store.jobs.requeue_stale(10, 3) == []
    assert store.jobs.requeue_stale(0.01, 3)[0]["id"] == job["id"]


def test_unfinished_job_folder_survives_sweep_and_finished_one_does_not(store):
    from service.store import Store

    upload = store.jobs.incoming_dir / "d.csv"
    upload.write_text("a\n1\n")
    job, _ = store.jobs.submit("m", {"n": 1}, data_path=upload)
    folder = store.root / "_jobs" / job["id"]
    Store(store.settings).close()  # start-up sweep of another process
    assert folder.exists()
    with store.db.sql.begin() as conn:  # a job that ended without its folder being removed (crash)
        conn.execute(sa.update(jobs_t).where(jobs_t.c.id == job["id"]).values(state="failed"))
    assert Store(store.settings).last_sweep["job_folders"] == 1
    assert not folder.exists()


def test_a_job_publishes_only_through_its_holder_and_only_once(store, kit):
    """A worker presumed dead (its job re-queued and claimed by another) cannot publish the job's result,
    and the job's holder cannot publish a second version: the check runs inside the publish transaction
    (common practice for fencing a lease holder: the lease is re-checked where the write commits)."""
    body, arrays = kit.linear_artifact(seed=1)
    job, _ = store.jobs.submit("m", {"spec": {}})
    first = store.jobs.claim("worker-a")
    _age_heartbeat(store, job["id"], 120)
    assert [j["id"] for j in store.jobs.requeue_stale(60, 3)] == [job["id"]]
    second = store.jobs.claim("worker-b")
    assert first["id"] == second["id"] == job["id"] and second["attempts"] == 2
    with pytest.raises(Conflict, match="no longer held by worker 'worker-a'"):
        store.publish("m", body, arrays, job_id=job["id"], holder="worker-a")
    assert store.list_models() == []  # nothing published, no version number used
    row = store.publish("m", body, arrays, job_id=job["id"], holder="worker-b")
    assert row["version"] == 1 and row["job_id"] == job["id"]
    with pytest.raises(Conflict, match="already published version 1"):
        store.publish("m", body, arrays, job_id=job["id"], holder="worker-b")
    assert [v["version"] for v in store.list_versions("m")] == [1]
    # The next publish still gets the next number: the refused ones left no gap.
    assert store.publish("m", body, arrays)["version"] == 2


def test_a_worker_does_not_requeue_its_own_job(store):
    """A worker that is alive enough to look for stale jobs is not dead: a late heartbeat of its own job is
    left for others to judge (they re-queue it if the worker really stopped)."""
    job, _ = store.jobs.submit("m", {"spec": {}})
    store.jobs.claim("w1")
    _age_heartbeat(store, job["id"], 120)
    assert store.jobs.requeue_stale(60, 3, caller="w1") == []
    assert store.jobs.get(job["id"])["state"] == "running"
    assert [j["id"] for j in store.jobs.requeue_stale(60, 3, caller="w2")] == [job["id"]]
