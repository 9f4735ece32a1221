"""Folder and file sources through the HTTP API: Dask through the worker, the file list fixed at
submission, files changed mid-job, folder listing, and refusals decided from file metadata.

References: the in-memory engine (itself checked against scikit-learn in tests/engine) for every CV
table; the Parquet format's footer (row counts per row group, Apache Parquet file format spec) for
what can be refused before a job is queued.
"""

from __future__ import annotations

import os
import re
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
        np.testing.assert_allclose(got["split_values"], want["split_values"], rtol=1e-10)


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


# ---- item 2: the file list is fixed at submission ------------------------------------------------------


def with_station(cols: dict, levels=("north", "south")) -> dict:
    out = dict(cols)
    n = len(next(iter(cols.values())))
    out["station"] = np.array([levels[i % len(levels)] for i in range(n)], dtype=object)
    return out


def run_one_job(settings, store):
    """Run the next queued job with a worker built like the embedded one (the job waited until now)."""
    from service.worker import Worker

    worker = Worker(settings, store)
    assert worker.run_once()


def test_a_symlink_added_while_the_job_waits_is_not_read(tmp_path, kit):
    spec = hash_spec(kit, categorical=["station"])
    cols = with_station(kit.pump_table(400, seed=41))
    with kit.service(tmp_path, worker=False) as (base, store, settings):
        write_parts(settings.data_dir / "june", cols, files=2)
        r = submit(base, "june", spec, promote="always")
        assert r.status_code == 202, r.text
        assert [f["name"] for f in r.json()["data"]["files"]] == ["june/part-0.parquet", "june/part-1.parquet"]
        # while the job waits: a link to data outside the data folder appears in the folder
        outside = tmp_path / "outside.parquet"
        pq.write_table(pa.table(with_station(kit.pump_table(50, seed=42), levels=("elsewhere",))), outside)
        (settings.data_dir / "june" / "part-2.parquet").symlink_to(outside)
        run_one_job(settings, store)
        job = httpx.get(f"{base}/v1/trainings/{r.json()['id']}").json()
        assert job["state"] == "succeeded", job["problem"]
        manifest = store.get_manifest("pumps", 1, cv_table=False)
        assert "elsewhere" not in str(manifest["training"])
        # exactly the listed rows: the in-memory engine on the 400 rows gives the same table
        assert_same_table(cv_rows(base)["table"], tune(cols, spec).cv_table)


def test_a_listed_file_replaced_by_a_symlink_is_refused(tmp_path, kit):
    spec = hash_spec(kit)
    with kit.service(tmp_path, worker=False) as (base, store, settings):
        files = write_parts(settings.data_dir / "june", kit.pump_table(300, seed=43), files=2)
        r = submit(base, "june", spec)
        assert r.status_code == 202, r.text
        outside = tmp_path / "outside.parquet"
        outside.write_bytes(files[1].read_bytes())  # the same bytes, but outside the data folder
        files[1].unlink()
        files[1].symlink_to(outside)
        run_one_job(settings, store)
        job = httpx.get(f"{base}/v1/trainings/{r.json()['id']}").json()
        assert job["state"] == "failed"
        assert job["problem"]["type"].endswith("/source-changed"), job["problem"]
        assert "'june/part-1.parquet' was replaced by a symbolic link" in job["problem"]["detail"]
        assert str(tmp_path) not in str(job)


# ---- item 3: files changed or deleted mid-job ------------------------------------------------------------


@pytest.mark.parametrize("change", ["rewritten", "deleted"])
def test_a_file_changed_after_submission_fails_the_job_with_a_clear_problem(tmp_path, kit, change):
    spec = hash_spec(kit)
    with kit.service(tmp_path, worker=False) as (base, store, settings):
        files = write_parts(settings.data_dir / "june", kit.pump_table(300, seed=44), files=2)
        r = submit(base, "june", spec)
        assert r.status_code == 202, r.text
        if change == "deleted":
            files[0].unlink()
        else:  # other rows, same file name
            pq.write_table(pa.table(kit.pump_table(150, seed=45)), files[0], row_group_size=100)
        run_one_job(settings, store)
        job = httpx.get(f"{base}/v1/trainings/{r.json()['id']}").json()
        assert job["state"] == "failed" and job["version"] is None
        assert job["problem"]["type"].endswith("/source-changed"), job["problem"]
        what = "was deleted or renamed" if change == "deleted" else "(was modified|changed size|was rewritten)"
        assert re.search(f"the source file 'june/part-0.parquet' {what}.* after the job was submitted",
                         job["problem"]["detail"]), job["problem"]
        assert str(settings.data_dir) not in str(job) and str(tmp_path) not in str(job)
        assert store.list_models() == []


class _ChangeAfterFirstPass:
    """An in-process executor that runs ``change()`` once the first pass (the scan) has finished."""

    name = "in-process"

    def __init__(self, change):
        from service.engine.executors import SerialExecutor

        self._inner, self._change, self.passes = SerialExecutor(), change, 0

    def map_reduce(self, fn, items, combine, **kw):
        out = self._inner.map_reduce(fn, items, combine, **kw)
        self.passes += 1
        if self.passes == 1:
            self._change()
        return out

    def close(self):
        pass


def test_a_parquet_file_rewritten_between_passes_is_detected(tmp_path, kit):
    from service.engine.streaming import tune_partitions
    from service.errors import SourceChanged
    from service.filelist import list_source
    from service.sources import open_files

    files = write_parts(tmp_path / "june", kit.pump_table(300, seed=46), files=2)
    schema, parts = open_files(list_source(tmp_path, tmp_path / "june"))

    def rewrite():  # other rows, same row count: without the check this pass would mix two data sets
        pq.write_table(pa.table(kit.pump_table(150, seed=47)), files[1], row_group_size=100)

    ex = _ChangeAfterFirstPass(rewrite)
    with pytest.raises(SourceChanged, match="'june/part-1.parquet' (was rewritten|was modified|changed size)"):
        tune_partitions(parts, schema, hash_spec(kit), executor=ex)
    assert ex.passes == 1


def test_a_csv_rewritten_between_passes_with_its_size_and_mtime_kept_is_detected(tmp_path, kit):
    """The content digest of every pass catches a change that keeps size and modification time."""
    import pyarrow.csv as pcsv

    from service.engine.streaming import tune_partitions
    from service.errors import SourceChanged
    from service.filelist import list_source
    from service.sources import CsvPart, open_files

    path = tmp_path / "june.csv"
    pcsv.write_csv(pa.table(kit.pump_table(300, seed=48)), path)
    schema, parts = open_files(list_source(tmp_path, path))
    parts = [CsvPart(p.ref.with_content_digest(), p.offset) for p in parts]  # as the training process does
    st = path.stat()

    def swap_digits():  # same length, same timestamps, other values in the middle of the file
        raw = bytearray(path.read_bytes())
        i = len(raw) // 2
        while not chr(raw[i]).isdigit() or raw[i] == ord("9"):
            i += 1
        raw[i] += 1
        path.write_bytes(bytes(raw))
        os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns))

    with pytest.raises(SourceChanged, match="'june.csv' was rewritten"):
        tune_partitions(parts, schema, hash_spec(kit), executor=_ChangeAfterFirstPass(swap_digits))


# ---- item 5: a folder of 0-row Parquet files --------------------------------------------------------------


def test_a_folder_of_empty_parquet_files_is_a_422_not_a_500(tmp_path, kit):
    with kit.service(tmp_path, worker=False) as (base, store, settings):
        empty = {k: v[:0] for k, v in kit.pump_table(10, seed=1).items()}
        write_parts(settings.data_dir / "empty", empty, files=2)
        r = submit(base, "empty", kit.SPEC)
        assert r.status_code == 422, r.text
        assert r.headers["content-type"].startswith("application/problem+json")
        assert "holds no rows" in r.json()["detail"] and "0 rows" in r.json()["detail"]
        assert store.jobs.list() == []


# ---- item 6: folder listing --------------------------------------------------------------------------------


def test_every_parquet_suffix_and_hive_subfolders_are_read_and_listed(tmp_path, kit):
    cols = kit.pump_table(800, seed=51)
    names = ["a.PARQUET", "b.Parquet", "c.pq", "d.parquet"]
    spec = hash_spec(kit)
    with kit.service(tmp_path, worker=True) as (base, store, settings):
        write_parts(settings.data_dir / "mixed", cols, files=4, names=names)
        (settings.data_dir / "mixed" / "_SUCCESS").write_bytes(b"")  # writers' side files are skipped
        (settings.data_dir / "mixed" / "notes.txt").write_text("not data")
        r = submit(base, "mixed", spec, promote="always")
        assert r.status_code == 202, r.text
        job = kit.wait_job(base, r.json()["id"])
        assert job["state"] == "succeeded", job
        assert job["data"]["file_count"] == 4 and job["data"]["rows"] == 800
        assert [f["name"] for f in job["data"]["files"]] == [f"mixed/{n}" for n in names]
        assert [f["rows"] for f in job["data"]["files"]] == [200, 200, 200, 200]
        assert_same_table(cv_rows(base)["table"], tune(cols, spec).cv_table)  # reference: in-memory engine

        # Hive layout: year=2023/..., year=2024/... give every row a `year` column (integers: a number)
        hive = kit.pump_table(600, seed=52)
        year = np.repeat([2023, 2024], 300)
        hive["energy_kwh"] = hive["energy_kwh"] + 0.5 * (year - 2023)
        for y in (2023, 2024):
            sel = year == y
            write_parts(settings.data_dir / "hive" / f"year={y}", {k: v[sel] for k, v in hive.items()}, files=2)
        hspec = hash_spec(kit, features=["flow_lps", "head_m", "year"])
        r = submit(base, "hive", hspec, promote="always")
        assert r.status_code == 202, r.text
        assert r.json()["data"]["columns"] == ["flow_lps", "head_m", "energy_kwh", "year"]
        job = kit.wait_job(base, r.json()["id"])
        assert job["state"] == "succeeded", job
        assert [f["name"] for f in job["data"]["files"]] == [
            "hive/year=2023/part-0.parquet", "hive/year=2023/part-1.parquet",
            "hive/year=2024/part-0.parquet", "hive/year=2024/part-1.parquet"]
        ref = tune({**hive, "year": year.astype(np.int64)}, hspec)
        assert_same_table(cv_rows(base, 2)["table"], ref.cv_table)  # reference: in-memory engine, year as a column


# ---- item 12: refused at submission from metadata ------------------------------------------------------


def test_what_the_metadata_shows_is_refused_before_a_job_is_queued(tmp_path, kit):
    with kit.service(tmp_path, worker=False) as (base, store, settings):
        d = settings.data_dir
        cols = kit.pump_table(300, seed=61)
        streaming = dict(kit.SPEC, execution={"mode": "streaming"})
        # 0 and 1 rows: the Parquet footer counts them (Apache Parquet format: FileMetaData.num_rows)
        pq.write_table(pa.table({k: v[:0] for k, v in cols.items()}), d / "none.parquet")
        pq.write_table(pa.table({k: v[:1] for k, v in cols.items()}), d / "one.parquet")
        r = submit(base, "none.parquet", streaming)
        assert r.status_code == 422 and "holds no rows" in r.json()["detail"], r.text
        r = submit(base, "one.parquet", streaming)
        assert r.status_code == 422, r.text
        assert "cv.folds=5 is more than the 1 row(s)" in r.json()["detail"]
        assert r.json()["errors"][0]["field"] == "cv.folds"

        # a row_key with one value in every row: footer statistics (min == max, no nulls) on the streamed
        # path, the column itself in memory; the same refusal on both
        const = dict(cols, site=np.full(300, 7, dtype=np.int64))
        write_parts(d / "sites", const, files=2)
        pq.write_table(pa.table(const), d / "sites.parquet")
        for source, spec in [("sites", dict(kit.SPEC, cv={"scheme": "kfold", "row_key": "site"})),
                             ("sites.parquet", dict(kit.SPEC, cv={"scheme": "kfold", "row_key": "site",
                                                                  "assignment": "hash"}))]:
            r = submit(base, source, spec)
            assert r.status_code == 422, (source, r.text)
            assert "cv.row_key='site' has the same value" in r.json()["detail"]
            assert r.json()["errors"][0]["field"] == "cv.row_key"

        # a CSV read whole at submission (under 8 MiB): its row count and row_key are exact too
        (d / "header.csv").write_text("flow_lps,head_m,energy_kwh\n")
        r = submit(base, "header.csv", streaming)
        assert r.status_code == 422 and "has a header but no rows" in r.json()["detail"], r.text  # the one CSV reader's words
        (d / "sites.csv").write_text("flow_lps,head_m,energy_kwh,site\n" + "".join(
            f"{a},{b},{c},7\n" for a, b, c in zip(*(v.tolist() for v in cols.values()))))
        r = submit(base, "sites.csv", dict(streaming, cv={"scheme": "kfold", "row_key": "site"}))
        assert r.status_code == 422 and "cv.row_key='site' has the same value" in r.json()["detail"], r.text

        # a streamed CSV whose target holds text after pyarrow's first 1 MiB block (type inference
        # looks at the first block only, so the job used to fail after queueing)
        big = kit.pump_table(40_000, seed=62)
        lines = ["flow_lps,head_m,energy_kwh"] + [f"{a!r},{b!r},{c!r}" for a, b, c in zip(*(v.tolist() for v in big.values()))]
        lines[35_001] = lines[35_001].rsplit(",", 1)[0] + ",n/a"
        (d / "late.csv").write_text("\n".join(lines) + "\n")
        assert (d / "late.csv").stat().st_size > 1 << 20
        r = submit(base, "late.csv", streaming)
        assert r.status_code == 422, r.text
        assert "column 'energy_kwh' (the target) holds 'n/a' at row 35000" in r.json()["detail"]
        assert store.jobs.list() == []


# ---- item 13: messages about files ------------------------------------------------------------------------


def test_file_messages_name_the_difference_the_folder_rule_and_compression(tmp_path, kit):
    import gzip

    with kit.service(tmp_path, worker=False) as (base, store, settings):
        d = settings.data_dir
        cols = kit.pump_table(200, seed=71)
        write_parts(d / "mixed", cols, files=2)
        odd = dict(cols, head_m=np.array([f"h{i}" for i in range(200)], dtype=object))
        pq.write_table(pa.table({k: v[:50] for k, v in odd.items()}), d / "mixed" / "part-2.parquet")
        r = submit(base, "mixed", kit.SPEC)
        assert r.status_code == 422, r.text
        detail = r.json()["detail"]
        assert "'mixed/part-2.parquet' stores 'head_m' as string (text) where 'mixed/part-0.parquet' stores " \
               "double (number)" in detail, detail

        write_parts(d / "june", cols, files=2)
        r = submit(base, "june", dict(kit.SPEC, cv={"scheme": "time_ordered", "order_by": "flow_lps"}))
        assert r.status_code == 422, r.text
        detail = r.json()["detail"]
        assert "is a folder, which is always read out of core" in detail and "combine the files" in detail
        assert "set execution.mode to memory for the others" not in detail

        csv = "flow_lps,head_m,energy_kwh\n" + "\n".join(f"{a},{b},{c}" for a, b, c in zip(*cols.values()))
        packed = gzip.compress(csv.encode())  # RFC 1952 gzip member: magic bytes 1f 8b
        (d / "june.csv.gz").write_bytes(packed)
        for spec in (kit.SPEC, dict(kit.SPEC, execution={"mode": "streaming"})):
            r = submit(base, "june.csv.gz", spec)
            assert r.status_code == 422, r.text
            assert "gzip-compressed file" in r.json()["detail"] and "\\x" not in r.text, r.text
        r = httpx.post(base + TRAININGS.format(name="pumps"), files={"file": ("june.csv.gz", packed)},
                       data={"spec": __import__("json").dumps(kit.SPEC)}, timeout=60)
        assert r.status_code == 422, r.text
        assert "gzip-compressed file" in r.json()["detail"] and "\\x" not in r.text
        assert store.jobs.list() == []
