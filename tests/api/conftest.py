"""Servers for the API tests: real uvicorn on a loopback port (``tests/livesvc.py``) over a real store."""

from __future__ import annotations

import numpy as np
import httpx
import pytest

import livesvc  # tests/livesvc.py (tests/ is on pytest's pythonpath)

running = livesvc.running
make_settings = livesvc.make_settings
service = livesvc.live_service


@pytest.fixture(scope="session")
def serve():
    """The ``running(app)`` context manager, as a fixture (test modules here are not a package)."""
    return running


FINAL = ("succeeded", "failed", "cancelled")


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
