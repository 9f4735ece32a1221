"""The live pointer: an operator's change is never undone by a job, and a broken version never goes live.

Found by an outside probe: a ``promote: always`` job that was running while an operator switched the
live version put its own version live on top of the operator's choice, and ``PUT .../live`` accepted a
version whose folder failed verification (every prediction then answered 500).
"""

from __future__ import annotations

import os
import time
from pathlib import Path

import httpx
import pytest


def _wait_job(base: str, job_id: str, timeout_s: float = 300) -> dict:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        job = httpx.get(f"{base}/v1/trainings/{job_id}", timeout=30).json()
        if job["state"] in ("succeeded", "failed", "cancelled"):
            return job
        time.sleep(0.1)
    raise AssertionError(f"job {job_id} did not finish")


def test_a_job_does_not_undo_an_operator_switch_made_while_it_ran(rk, tmp_path):
    from livesvc import live_service

    with live_service(tmp_path, worker=False) as (base, store, settings):
        rk.publish_demo(store, "pumps", seed=0, live=True)       # v1 live when the job is submitted
        rk.publish_demo(store, "pumps", seed=1, live=False)      # v2, the operator's later choice
        r = httpx.post(f"{base}/v1/models/pumps/trainings", timeout=60, json={
            "spec": rk.QUICK_SPEC, "promote": "always",
            "data": {"csv": rk.csv_text(rk.demo_rows(300, seed=4))}})
        assert r.status_code == 202, r.text
        job_id = r.json()["id"]
        # The operator switches to v2 while the job waits for a worker.
        switch = httpx.put(f"{base}/v1/models/pumps/live", json={"version": 2, "reason": "operator's pick"}, timeout=30)
        assert switch.status_code == 200, switch.text

        from service.worker import Worker

        worker = Worker(settings, store)
        assert worker.run_once()
        job = _wait_job(base, job_id)
        assert job["state"] == "succeeded" and job["version"] == 3
        assert job["decision"]["went_live"] is False
        assert job["decision"]["live_seen"] == 1 and job["decision"]["live_now"] == 2
        assert "live version changed from 1 to 2 after the job was submitted" in job["decision"]["reason"]
        assert store.live_version("pumps") == 2  # the operator's change stands
        last = store.history("pumps")[-1]
        assert (last["from_version"], last["to_version"]) == (2, 2)
        assert last["details"]["not_made_live"] == 3 and last["details"]["job_id"] == job_id
        assert "was not made live because the live version changed" in last["reason"]

        # Without an intervening change the same kind of job does go live (the rule is not "never").
        r = httpx.post(f"{base}/v1/models/pumps/trainings", timeout=60, json={
            "spec": rk.QUICK_SPEC, "promote": "always", "data": {"csv": rk.csv_text(rk.demo_rows(300, seed=5))}})
        assert worker.run_once()
        job = _wait_job(base, r.json()["id"])
        assert job["decision"]["went_live"] is True and store.live_version("pumps") == 4


@pytest.mark.parametrize("damage", ["swapped", "truncated", "missing"])
def test_a_version_that_fails_verification_cannot_go_live(rk, tmp_path, damage):
    from livesvc import live_service

    with live_service(tmp_path, worker=False) as (base, store, settings):
        rk.publish_demo(store, "pumps", seed=0, live=True)
        rk.publish_demo(store, "pumps", seed=1, live=False)
        rk.publish_demo(store, "pumps", seed=2, live=False)
        folder = Path(settings.store) / "pumps"
        if damage == "swapped":  # two complete folders exchanged: each fails its catalog checksum
            os.rename(folder / "2", folder / "x"), os.rename(folder / "3", folder / "2"), os.rename(folder / "x", folder / "3")
        elif damage == "truncated":
            arrays = folder / "2" / "arrays.npz"
            arrays.write_bytes(arrays.read_bytes()[:100])
        else:
            (folder / "2" / "manifest.json").unlink()
        r = httpx.put(f"{base}/v1/models/pumps/live", json={"version": 2, "reason": "try it"}, timeout=30)
        body = rk.assert_problem(r, 409)
        assert "version 2 of model 'pumps' failed verification" in body["detail"]
        assert "stays live" in body["detail"] and str(tmp_path) not in body["detail"]
        assert body["errors"][0]["field"] == "version" and body["errors"][0]["value"] == 2
        assert store.live_version("pumps") == 1
        assert [h["to_version"] for h in store.history("pumps")] == [1]
        served = httpx.post(f"{base}/v1/models/pumps/predictions", json={"rows": [{"flow_lps": 70, "head_m": 35}]}, timeout=30)
        assert served.status_code == 200 and served.json()["model"]["version"] == 1
