"""A training process dies with the worker or server that started it, and the re-queued job publishes once.

A standalone worker (``tikhon worker``) and a server with its embedded worker (``tikhon serve``) are each
SIGKILLed alone (not their process group) while their training process runs. The training process must
be gone within ``BOUND_S`` (it is told by the kernel at once, PR_SET_PDEATHSIG, prctl(2); its own watch of
its parent checks every second), well before the job, which takes much longer, could have ended by
itself. The job is then re-queued, trained again by a new worker and publishes exactly one version.
"""

from __future__ import annotations

import time
from pathlib import Path

import httpx
import pytest
from livesvc import wait_for

pytestmark = pytest.mark.slow

NAME = "pumps"
# The slow spec over 1,500 rows: well over BOUND_S of training on this machine, so an orphan would still be
# running when the bound is checked.
ROWS = 1500
BOUND_S = 10.0
FINAL = ("succeeded", "failed", "cancelled")


def children(pid: int) -> dict[int, str]:
    """Live child processes of ``pid`` with their command lines, from /proc (Linux)."""
    out = {}
    for d in Path("/proc").iterdir():
        if not d.name.isdigit():
            continue
        try:
            stat = (d / "stat").read_text()
            fields = stat[stat.rindex(")") + 2:].split()
            if int(fields[1]) == pid and fields[0] != "Z":
                out[int(d.name)] = (d / "cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
        except (FileNotFoundError, ProcessLookupError, ValueError):
            continue
    return out


def running(pid: int) -> bool:
    """The process exists and is not a zombie (an orphan's zombie may wait for a reaper that never comes)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return False
    return stat[stat.rindex(")") + 2:].split()[0] != "Z"




def _submit(base: str, rk) -> str:
    body = {"data": {"csv": rk.csv_text(rk.demo_rows(ROWS, seed=4))}, "spec": rk.SLOW_SPEC, "promote": "always"}
    r = httpx.post(f"{base}/v1/models/{NAME}/trainings", json=body, timeout=120)
    assert r.status_code == 202, r.text
    return r.json()["id"]


def _job(base: str, job_id: str) -> dict:
    return httpx.get(f"{base}/v1/trainings/{job_id}", timeout=30).json()


def _training_child(parent_pid: int) -> int:
    """The pid of the training process (a multiprocessing spawn child) of ``parent_pid``, once it runs."""
    found = wait_for(lambda: [p for p, cmd in children(parent_pid).items() if "spawn_main" in cmd],
                     "the training process to start")
    assert len(found) == 1, found
    return found[0]


def _kill_and_check_child(victim, job_id: str, base: str | None, store_settings: dict, rk) -> tuple[int, float]:
    child = _training_child(victim.pid)
    if base is not None:  # the search is under way (at least one unit done) before the kill
        wait_for(lambda: (_job(base, job_id)["progress"]["done"] or 0) >= 1, "training progress")
    victim.kill(group=False)  # the worker or server alone: nothing else is sent to its children
    killed_at = time.monotonic()
    end = killed_at + BOUND_S
    while running(child) and time.monotonic() < end:
        time.sleep(0.05)
    gone_after = time.monotonic() - killed_at
    assert not running(child), f"training process {child} still runs {BOUND_S} s after its parent was SIGKILLed"
    return child, gone_after


def _one_version(settings: dict, job_id: str, rk) -> None:
    store = rk.open_store(settings)
    try:
        versions = store.list_versions(NAME)
        job = store.jobs.get(job_id)
    finally:
        store.close()
    assert [(v["version"], v["job_id"]) for v in versions] == [(1, job_id)]  # exactly one version, this job's
    assert job["state"] == "succeeded" and job["version"] == 1 and job["attempts"] == 2, job


def test_standalone_worker_sigkill_takes_its_training_process_along(tmp_path, rk):
    settings = rk.base_settings(tmp_path, embedded_worker=False, worker_stale_s=1.5, max_attempts=3)
    with rk.server_process(tmp_path, **settings) as server:
        job_id = _submit(server.base, rk)
        victim = rk.WorkerProcess(settings, tmp_path / "victim.log")
        try:
            child, gone_after = _kill_and_check_child(victim, job_id, server.base, settings, rk)
        finally:
            victim.stop()
        print(f"\ntraining process {child} gone {gone_after:.2f} s after its worker's SIGKILL")
        assert _job(server.base, job_id)["state"] in ("running", "queued")  # not ended by the kill itself
        rescuer = rk.WorkerProcess(settings, tmp_path / "rescuer.log")
        try:
            final = wait_for(lambda: (j := _job(server.base, job_id))["state"] in FINAL and j, "the re-run to end")
        finally:
            rescuer.stop()
        assert final["state"] == "succeeded", final
    _one_version(settings, job_id, rk)


def test_server_sigkill_takes_its_embedded_workers_training_process_along(tmp_path, rk):
    settings = rk.base_settings(tmp_path, embedded_worker=True, worker_stale_s=1.5, max_attempts=3)
    server = rk.ServerProcess(settings, tmp_path / "server-1.log").wait_ready()
    try:
        job_id = _submit(server.base, rk)
        child, gone_after = _kill_and_check_child(server, job_id, server.base, settings, rk)
    finally:
        server.stop()
    print(f"\ntraining process {child} gone {gone_after:.2f} s after the server's SIGKILL")
    # A new server on the same store (and port) re-queues the stale job with its embedded worker.
    again = rk.ServerProcess({**settings, "port": server.settings["port"]}, tmp_path / "server-2.log").wait_ready()
    try:
        final = wait_for(lambda: (j := _job(again.base, job_id))["state"] in FINAL and j, "the re-run to end")
    finally:
        again.stop()
    assert final["state"] == "succeeded", final
    _one_version(settings, job_id, rk)
