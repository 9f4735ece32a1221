"""Folder and file sources through the HTTP API: Dask through the worker, the file list fixed at
submission, files changed mid-job, folder listing, and refusals decided from file metadata.

References: the in-memory engine (itself checked against scikit-learn in tests/engine) for every CV
table; the Parquet format's footer (row counts per row group, Apache Parquet file format spec) for
what can be refused before a job is queued.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from service.engine import tune

TRAININGS = "/v1/models/{name}/trainings"  # one constant for the route (renames land in one place)


def write_parts(folder: Path, cols: dict, files: int = 3, names=None) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    n = len(next(iter(cols.values())))
    cuts = np.linspace(0, n, files + 1).astype(int)
    out = []
    for i in range(files):
        p = folder / (names[i] if names else f"part-{i}.parquet")
        p.parent.mkdir(parents=True, exist_ok=True)
        pq.write_table(pa.table({k: v[cuts[i]:cuts[i + 1]] for k, v in cols.items()}), p, row_group_size=100)
        out.append(p)
    return out


def hash_spec(kit, **extra):
    return dict(kit.SPEC, cv={"scheme": "kfold", "folds": 5, "seed": 7, "assignment": "hash"},
                execution={"batch_rows": 256}, **extra)


def submit(base, source, spec, **body):
    return httpx.post(base + TRAININGS.format(name="pumps"), json={"data": {"source": source}, "spec": spec, **body},
                      timeout=60)


def cv_rows(base, version=1):
    return httpx.get(f"{base}/v1/models/pumps/versions/{version}/cv?view=all", timeout=30).json()


def assert_same_table(rows, reference):
    assert len(rows) == len(reference)
    for got, want in zip(rows, reference):
        np.testing.assert_allclose(got["folds"], want["folds"], rtol=1e-10)


# ---- item 1: Dask through the worker ------------------------------------------------------------------


def test_dask_local_cluster_trains_a_folder_through_the_api(tmp_path, kit):
    """TIKHON_DASK_SCHEDULER=local: the training process starts a LocalCluster (worker processes of its own)."""
    spec = hash_spec(kit)
    cols = kit.pump_table(600, seed=31)
    with kit.service(tmp_path, worker=True, dask_scheduler="local", dask_local_workers=1,
                     max_training_seconds=240) as (base, store, settings):
        write_parts(settings.data_dir / "june", cols)
        r = submit(base, "june", spec, promote="always")
        assert r.status_code == 202, r.text
        job = kit.wait_job(base, r.json()["id"], deadline_s=240)
        assert job["state"] == "succeeded", job
        cv = cv_rows(base)
        assert cv["summary"]["executor"].startswith("dask"), cv["summary"]
        # reference: the in-memory engine with hash folds on the same rows (scikit-learn-checked in tests/engine)
        assert_same_table(cv["table"], tune(cols, spec).cv_table)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_port(port: int, proc, deadline_s: float = 60.0) -> None:
    end = time.monotonic() + deadline_s  # a readiness wait: it fails only if the scheduler never listens
    while time.monotonic() < end:
        if proc.poll() is not None:
            raise AssertionError(f"dask scheduler exited with {proc.returncode}")
        with socket.socket() as s:
            if s.connect_ex(("127.0.0.1", port)) == 0:
                return
        time.sleep(0.1)
    raise AssertionError("dask scheduler did not listen")


def test_separate_dask_cluster_trains_a_folder_through_the_api(tmp_path, kit):
    """A `dask scheduler` and a `dask worker` started as their own processes on loopback."""
    port = _free_port()
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(p for p in [str(Path(__file__).resolve().parents[2]),
                                                                  os.environ.get("PYTHONPATH", "")] if p))
    log = open(tmp_path / "dask.log", "wb")
    scheduler = subprocess.Popen(["timeout", "300", sys.executable, "-m", "distributed.cli.dask_scheduler",
                                  "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
                                 env=env, stdout=log, stderr=subprocess.STDOUT)
    procs = [scheduler]
    try:
        _wait_port(port, scheduler)
        procs.append(subprocess.Popen(["timeout", "300", sys.executable, "-m", "distributed.cli.dask_worker",
                                       f"tcp://127.0.0.1:{port}", "--nworkers", "1", "--nthreads", "1",
                                       "--no-dashboard", "--host", "127.0.0.1"],
                                      env=env, stdout=log, stderr=subprocess.STDOUT))
        spec = hash_spec(kit)
        cols = kit.pump_table(600, seed=32)
        with kit.service(tmp_path, worker=True, dask_scheduler=f"tcp://127.0.0.1:{port}",
                         max_training_seconds=240) as (base, store, settings):
            write_parts(settings.data_dir / "june", cols)
            r = submit(base, "june", spec, promote="always")
            assert r.status_code == 202, r.text
            job = kit.wait_job(base, r.json()["id"], deadline_s=240)
            assert job["state"] == "succeeded", (job, (tmp_path / "dask.log").read_text()[-2000:])
            cv = cv_rows(base)
            assert cv["summary"]["executor"] == f"dask tcp://127.0.0.1:{port}"
            assert_same_table(cv["table"], tune(cols, spec).cv_table)  # reference: in-memory engine
    finally:
        for p in reversed(procs):
            p.terminate()
        for p in reversed(procs):
            try:
                p.wait(20)
            except subprocess.TimeoutExpired:
                p.kill()
        log.close()
