"""A streamed job's scanned-column cache through the worker: used, exact, and gone when the job ends.

References: the same streamed training run directly without the cache (equal to the in-memory engine,
itself checked against scikit-learn in tests/engine/test_reference.py). The cache's own exactness and
size limit are checked in tests/test_scancache.py; the safety of the scratch folders after a killed
worker in tests/store/test_scratch.py.
"""

from __future__ import annotations

import threading
from pathlib import Path

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from livesvc import wait_for  # tests/livesvc.py

TRAININGS = "/v1/models/{name}/trainings"


def write_parts(folder: Path, cols: dict, files: int = 3) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    n = len(next(iter(cols.values())))
    cuts = np.linspace(0, n, files + 1).astype(int)
    out = []
    for i in range(files):
        p = folder / f"part-{i}.parquet"
        pq.write_table(pa.table({k: v[cuts[i]:cuts[i + 1]] for k, v in cols.items()}), p, row_group_size=100)
        out.append(p)
    return out


def submit(base, source, spec, **body):
    return httpx.post(base + TRAININGS.format(name="pumps"), json={"data": {"source": source}, "spec": spec, **body},
                      timeout=60)


def spec_of(kit, **extra):
    return dict(kit.SPEC, cv={"scheme": "kfold", "folds": 5, "seed": 7, "assignment": "hash"},
                execution={"mode": "streaming", "batch_rows": 256}, **extra)


def scratch_entries(store) -> list[str]:
    root = Path(store.root) / ".scratch"
    return sorted(p.name for p in root.iterdir()) if root.exists() else []


def cached_files(store) -> list[Path]:
    root = Path(store.root) / ".scratch"
    return [f for d in root.iterdir() if d.is_dir() for f in d.iterdir() if f.name.startswith("part-")] \
        if root.exists() else []


def run_worker_once(settings, store) -> threading.Thread:
    from service.worker import Worker

    t = threading.Thread(target=lambda: Worker(settings, store).run_once(), daemon=True)
    t.start()
    return t


def test_a_succeeded_job_equals_training_without_the_cache_and_leaves_no_scratch(tmp_path, kit):
    from service.engine.streaming import tune_partitions
    from service.sources import open_source

    spec = spec_of(kit)
    cols = kit.pump_table(3000, seed=51)
    with kit.service(tmp_path, worker=False) as (base, store, settings):
        assert settings.scan_cache_bytes == 2 * 2**30
        write_parts(settings.data_dir / "june", cols)
        r = submit(base, "june", spec, promote="always")
        assert r.status_code == 202, r.text
        run_worker_once(settings, store).join(300)
        job = httpx.get(f"{base}/v1/trainings/{r.json()['id']}").json()
        assert job["state"] == "succeeded", job["problem"]
        assert scratch_entries(store) == []
        rows = httpx.get(f"{base}/v1/models/pumps/versions/1/cv?view=all", timeout=30).json()["table"]
        schema, parts = open_source(settings.data_dir / "june")
        plain = tune_partitions(parts, schema, spec)
        # bit for bit: JSON carries float64 exactly (shortest round-trip repr)
        assert [row["split_values"] for row in rows] == [row["split_values"] for row in plain.cv_table]
        model = store.load("pumps", 1).model
        q = {k: cols[k][:50] for k in ("flow_lps", "head_m")}
        np.testing.assert_array_equal(model.predict(q), plain.model.predict(q))


def test_the_cache_is_used_while_the_job_runs_and_removed_when_it_is_cancelled(tmp_path, kit):
    # a grid wide enough that the job runs for a while after its scan: every RBF width is a pass of its own
    spec = spec_of(kit, bases=[{"kind": "rbf", "widths": [0.5, 1.0, 2.0, 4.0, 8.0, 16.0], "centers": 200}])
    with kit.service(tmp_path, worker=False, cancel_grace_s=2.0) as (base, store, settings):
        write_parts(settings.data_dir / "june", kit.pump_table(120_000, seed=52), files=2)
        r = submit(base, "june", spec)
        assert r.status_code == 202, r.text
        t = run_worker_once(settings, store)
        files = wait_for(lambda: [f for f in cached_files(store) if f.name.endswith(".arrow")],
                         "the scan to finish a partition's cache file")
        assert files[0].stat().st_size > 120_000 // 2 * 3 * 8 * 0.9  # three float64 columns of a partition
        assert httpx.delete(f"{base}/v1/trainings/{r.json()['id']}").status_code in (200, 202)
        t.join(300)
        assert httpx.get(f"{base}/v1/trainings/{r.json()['id']}").json()["state"] == "cancelled"
        assert scratch_entries(store) == []


def test_a_failed_job_leaves_no_scratch(tmp_path, kit):
    cols = kit.pump_table(3000, seed=53)
    cols["head_m"] = cols["head_m"].copy()
    cols["head_m"][2900] = np.nan  # in the last file: found by the scan after two partitions were cached
    with kit.service(tmp_path, worker=False) as (base, store, settings):
        write_parts(settings.data_dir / "june", cols)
        r = submit(base, "june", spec_of(kit))
        assert r.status_code == 202, r.text
        run_worker_once(settings, store).join(300)
        job = httpx.get(f"{base}/v1/trainings/{r.json()['id']}").json()
        assert job["state"] == "failed" and "head_m" in job["problem"]["detail"], job
        assert scratch_entries(store) == []


def test_no_scratch_without_a_limit_or_on_dask(tmp_path, kit):
    from service.worker import Worker
    import contextlib

    with kit.service(tmp_path, worker=False, scan_cache_bytes=0) as (base, store, settings):
        w = Worker(settings, store)
        with contextlib.ExitStack() as held:
            assert w._scratch(held, "a" * 32, {"files": []}) is None
            w.settings = settings.model_copy(update={"scan_cache_bytes": 1 << 20, "dask_scheduler": "local"})
            assert w._scratch(held, "a" * 32, {"files": []}) is None
            w.settings = settings.model_copy(update={"scan_cache_bytes": 1 << 20})
            assert w._scratch(held, "a" * 32, None) is None  # an in-memory job
            got = w._scratch(held, "a" * 32, {"files": []})
            assert got["limit"] == 1 << 20 and Path(got["folder"]).parent == Path(store.root) / ".scratch"
            assert len(scratch_entries(store)) == 2  # the folder and its lock, held
        assert scratch_entries(store) == []


LONG_SPEC_BASES = [{"kind": "rbf", "widths": [0.5, 1.0, 2.0, 4.0, 8.0, 16.0], "centers": 200}]


def test_a_killed_training_process_leaves_no_scratch(tmp_path, kit):
    import os
    import signal

    from service.worker import Worker

    with kit.service(tmp_path, worker=False) as (base, store, settings):
        write_parts(settings.data_dir / "june", kit.pump_table(120_000, seed=54), files=2)
        r = submit(base, "june", spec_of(kit, bases=LONG_SPEC_BASES))
        assert r.status_code == 202, r.text
        worker = Worker(settings, store)
        t = threading.Thread(target=worker.run_once, daemon=True)
        t.start()
        wait_for(lambda: [f for f in cached_files(store) if f.name.endswith(".arrow")], "a cache file")
        os.kill(worker._proc.pid, signal.SIGKILL)  # as the kernel's OOM killer would
        t.join(300)
        job = httpx.get(f"{base}/v1/trainings/{r.json()['id']}").json()
        assert job["state"] == "failed" and "ended without a result" in job["problem"]["detail"], job
        assert scratch_entries(store) == []


def test_a_killed_worker_leaves_a_scratch_that_the_next_start_removes(tmp_path, kit):
    """`tikhon worker` killed with SIGKILL while its job runs: nothing cleans up then (its training process
    dies with it); the store's start-up sweep in the next process removes the scratch folder, whose lock
    no process holds any more."""
    import os
    import signal
    import subprocess
    import sys

    from service.store import Store

    with kit.service(tmp_path, worker=False) as (base, store, settings):
        write_parts(settings.data_dir / "june", kit.pump_table(120_000, seed=55), files=2)
        r = submit(base, "june", spec_of(kit, bases=LONG_SPEC_BASES))
        assert r.status_code == 202, r.text
        env = {k: v for k, v in os.environ.items() if not k.startswith("TIKHON_")}
        env.update(TIKHON_STORE=str(settings.store), TIKHON_DATA_DIR=str(settings.data_dir),
                   TIKHON_WORKER_POLL_S="0.05", TIKHON_WORKER_HEARTBEAT_S="0.2", TIKHON_LOG_LEVEL="warning",
                   PYTHONPATH=str(Path(__file__).resolve().parents[2]) + os.pathsep + env.get("PYTHONPATH", ""))
        proc = subprocess.Popen([sys.executable, "-m", "service.cli", "worker"], env=env,
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            files = wait_for(lambda: [f for f in cached_files(store) if f.name.endswith(".arrow")], "a cache file")
        finally:
            proc.send_signal(signal.SIGKILL)
            proc.wait(30)
        folder = files[0].parent

        def swept() -> bool:  # a process starting: its store sweeps (the folder is busy until the training dies)
            with Store(store.settings) as again:
                return again.last_sweep["scratch"] == 1 or not folder.exists()

        wait_for(swept, "the training process to die with its worker and the sweep to remove its scratch")
        assert scratch_entries(store) == []
