"""Sustained load: a bounded soak on loopback at 70% of the measured maximum, with a retraining and a
live switch in the middle (the procedure and its figures: ``benchmarks/bench_soak.py``, run here through
its ``run_soak``).

Asserted: zero errors (every request answered 200), the server alive at the end, the retraining
succeeded and the switch answered 200, both versions served, every response's ``model`` block names the
version whose stored artifact reproduces its numbers (and no other version does), and the server's RSS
grew by less than 10% from the end of the warm-up to the end. Reported, not asserted (machines are
shared and noisy): the request rate, p50 and p99 latency. The full soak lasts 5 minutes
(``TIKHON_CI_FULL=1`` or ``-m slow``); the README's test command runs 30 seconds.
"""

from __future__ import annotations

import importlib.util
import json

import pytest

pytestmark = pytest.mark.slow


def _bench(rk):
    spec = importlib.util.spec_from_file_location("tikhon_bench_soak", rk.REPO / "benchmarks" / "bench_soak.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_soak_at_a_fixed_rate_with_a_retraining_and_a_live_switch(tmp_path, rk, full):
    fig = _bench(rk).run_soak(tmp_path, duration=300.0 if full else 30.0, probe_s=10.0 if full else 4.0)
    print("\nsoak figures: " + json.dumps({k: v for k, v in fig.items() if k != "error_samples"}, default=str))
    assert fig["requests"] >= 100
    assert fig["errors"] == 0, fig["error_samples"]
    assert fig["server_alive"]
    assert fig["warmup_training"] == "succeeded"
    ev = fig["events"]
    assert ev.get("retrain_state") == "succeeded" and ev.get("switch_status") == 200, ev
    assert set(fig["served_by_version"]) == {1, ev["switched_to"]}, fig["served_by_version"]
    assert fig["version_mismatches"] == 0
    assert fig["rss_growth"] < 0.10, (fig["rss_at_warmup_mb"], fig["rss_end_mb"])


def _children(pid: int) -> list[int]:
    from pathlib import Path

    out = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        text = (task / "children").read_text().split()
        out += [int(c) for c in text]
    return out


def _niceness(pid: int) -> int:
    from pathlib import Path

    stat = Path(f"/proc/{pid}/stat").read_text()
    return int(stat.rsplit(")", 1)[1].split()[16])  # proc(5): field 19, "nice"


def test_training_runs_at_a_lower_cpu_priority_than_its_worker(tmp_path, rk):
    """What keeps the soak's latency flat during the retraining: the training process is niced
    (proc(5) field 19) by service.worker.TRAINING_NICENESS relative to the worker that spawned it."""
    import time

    import httpx

    from service.worker import TRAINING_NICENESS

    settings = rk.base_settings(tmp_path, embedded_worker=False)
    with rk.server_process(tmp_path, **settings) as server:
        spec = {**rk.QUICK_SPEC, "bases": [{"kind": "polynomial", "degrees": [2, 3, 4, 5, 6]},
                                           {"kind": "rbf", "widths": [0.5, 1.0, 2.0], "centers": 60}]}
        r = httpx.post(f"{server.base}/v1/models/pumps/trainings", timeout=120, json={
            "data": {"csv": rk.csv_text(rk.demo_rows(20_000, seed=8))}, "spec": spec, "promote": "always"})
        assert r.status_code == 202, r.text
        worker = rk.WorkerProcess(settings, tmp_path / "worker.log")
        try:
            end = time.monotonic() + 120
            kids: list[int] = []
            job_id = r.json()["id"]
            while not kids:  # wait until the training has begun its search (a readiness wait)
                assert time.monotonic() < end, worker.log_text()[-2000:]
                job = httpx.get(f"{server.base}/v1/trainings/{job_id}", timeout=60).json()
                if job["state"] == "running" and (job["progress"] or {}).get("total"):
                    kids = [k for k in _children(worker.pid) if "spawn_main" in open(f"/proc/{k}/cmdline").read()]
                time.sleep(0.02)
            assert len(kids) == 1
            assert _niceness(kids[0]) == _niceness(worker.pid) + TRAINING_NICENESS
            assert TRAINING_NICENESS > 0
        finally:
            worker.stop()
