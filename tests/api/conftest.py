"""Run an ASGI app under a real uvicorn server on a loopback port, in a background thread."""

from __future__ import annotations

import contextlib
import socket
import threading
import time

import pytest
import uvicorn


@contextlib.contextmanager
def running(app, *, host: str = "127.0.0.1"):
    """Yield the base URL of ``app`` served by uvicorn on a free loopback port; stop it afterwards."""
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind((host, 0))
    port = sock.getsockname()[1]
    config = uvicorn.Config(app, log_level="warning", access_log=False, lifespan="on", timeout_graceful_shutdown=5)
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    # Wait for start-up (a readiness wait, not a timed assertion: it fails only if the server never starts).
    deadline = time.monotonic() + 30
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            raise RuntimeError("uvicorn did not start")
        time.sleep(0.01)
    try:
        yield f"http://{host}:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)
        sock.close()


@pytest.fixture(scope="session")
def serve():
    """The ``running(app)`` context manager, as a fixture (test modules here are not a package)."""
    return running


# ----------------------------------------------------------------------------------------------------
# Servers over a real store in a temporary folder. Timings are small so the suite is quick; no test
# asserts on time.

import numpy as np  # noqa: E402
import httpx  # noqa: E402

from service.settings import Settings  # noqa: E402

FINAL = ("succeeded", "failed", "cancelled")


def make_settings(root, **over) -> Settings:
    base = dict(
        store=root / "store", data_dir=root / "data", worker_heartbeat_s=0.2, worker_poll_s=0.05,
        worker_stale_s=30.0, cancel_grace_s=5.0, auth_cache_s=0.0, live_cache_s=0.0, log_level="warning",
    )
    base.update(over)
    (root / "data").mkdir(parents=True, exist_ok=True)
    return Settings(**base)


def pump_table(n: int, seed: int, noise: float = 2.0) -> dict[str, np.ndarray]:
    """A known model with known Gaussian noise: energy = 3 + 0.5 flow + 0.02 flow*head - 0.004 flow^2 + N(0, noise^2)."""
    rng = np.random.default_rng(seed)
    flow = rng.uniform(5.0, 120.0, n)
    head = rng.uniform(10.0, 60.0, n)
    energy = 3.0 + 0.5 * flow + 0.02 * flow * head - 0.004 * flow**2 + rng.normal(0.0, noise, n)
    return {"flow_lps": flow, "head_m": head, "energy_kwh": energy}


def as_rows(cols: dict[str, np.ndarray]) -> list[dict[str, float]]:
    names = list(cols)
    return [dict(zip(names, vals)) for vals in zip(*(cols[k].tolist() for k in names))]


SPEC = {
    "target": "energy_kwh",
    "features": ["flow_lps", "head_m"],
    "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]}],
    "penalty": {"kind": "l2", "strengths": {"min": 1e-4, "max": 1e2, "count": 12}},
    "cv": {"scheme": "kfold", "folds": 5, "seed": 7},
}


def wait_job(base: str, job_id: str, headers=None, deadline_s: float = 180.0) -> dict:
    """Poll a job until it ends (a readiness wait; it fails only if the job never ends)."""
    import time

    end = time.monotonic() + deadline_s
    while True:
        job = httpx.get(f"{base}/v1/trainings/{job_id}", headers=headers).json()
        if job["state"] in FINAL:
            return job
        if time.monotonic() > end:
            raise AssertionError(f"job {job_id} did not end: {job}")
        time.sleep(0.05)


@contextlib.contextmanager
def service(root, *, worker: bool, **over):
    from service.api.server import build

    settings = make_settings(root, **over)
    app, store, w = build(settings, embedded_worker=worker)
    if w is not None:
        w.start()
    try:
        with running(app) as base:
            yield base, store, settings
    finally:
        if w is not None:
            w.stop()
        store.close()


@pytest.fixture(scope="module")
def worker_service(tmp_path_factory):
    with service(tmp_path_factory.mktemp("svc"), worker=True) as s:
        yield s


@pytest.fixture(scope="session")
def kit():
    """The helpers above, for test modules (which are not a package and cannot import conftest)."""
    import types

    return types.SimpleNamespace(
        pump_table=pump_table, as_rows=as_rows, SPEC=SPEC, wait_job=wait_job, service=service,
        make_settings=make_settings,
    )
