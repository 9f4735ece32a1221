"""Out-of-core and distributed training give the in-memory answer.

Reference: the in-memory engine (itself checked against scikit-learn in test_reference.py) with hash
fold assignment; the data are the diabetes set that ships with scikit-learn (Efron et al., 2004),
written to Parquet/CSV here. Tolerance 1e-12 relative on every fold value of the CV table: summaries
merged in a different order differ only by rounding.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sklearn.datasets import load_diabetes

from service.engine import tune
from service.engine.streaming import tune_partitions
from service.errors import InvalidData, InvalidSpec
from service.sources import open_source


def data(n=None):
    X, y = load_diabetes(return_X_y=True)
    d = {f"x{j}": X[:, j] for j in range(6)}
    d["sex"] = np.where(X[:, 1] > 0, "f", "m")  # a categorical column derived from the shipped data
    d["y"] = y
    return d


def write_folder(tmp_path, d, files=3, row_group=50):
    folder = tmp_path / "parts"
    folder.mkdir()
    n = len(d["y"])
    cuts = np.linspace(0, n, files + 1).astype(int)
    for i in range(files):
        part = {k: v[cuts[i]:cuts[i + 1]] for k, v in d.items()}
        pq.write_table(pa.table(part), folder / f"part-{i:03d}.parquet", row_group_size=row_group)
    return folder


def assert_same(a, b, tol=1e-12):
    assert len(a.cv_table) == len(b.cv_table)
    for r1, r2 in zip(a.cv_table, b.cv_table):
        assert r1["basis"] == r2["basis"] and r1["strength"] == r2["strength"] and r1["l1_ratio"] == r2["l1_ratio"]
        np.testing.assert_allclose(r2["split_values"], r1["split_values"], rtol=tol)
    assert a.chosen["basis"] == b.chosen["basis"]
    assert a.chosen["penalty"] == b.chosen["penalty"]


SPEC = {"target": "y", "features": ["x0", "x2", "x3", "x4"], "categorical": ["sex"],
        "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]},
                  {"kind": "rbf", "widths": [1.0, 2.0], "centers": 25}],
        "penalty": {"strengths": {"min": 1e-2, "max": 1e3, "count": 12}},
        "cv": {"folds": 5, "seed": 9, "assignment": "hash"}, "execution": {"batch_rows": 256}}


def test_in_memory_parquet_batches_and_dask_agree(tmp_path):
    d = data()
    mem = tune(d, SPEC)
    schema, parts = open_source(write_folder(tmp_path, d))
    assert len(parts) == 3 and [p.offset for p in parts] == [0, 147, 294]
    ooc = tune_partitions(parts, schema, SPEC)
    assert_same(mem, ooc)
    q = {k: d[k][:20] for k in ["x0", "x2", "x3", "x4", "sex"]}
    np.testing.assert_allclose(ooc.model.predict(q), mem.model.predict(q), rtol=1e-12)
    a = mem.model.predict_detail(q, interval_level=0.9)
    b = ooc.model.predict_detail(q, interval_level=0.9)
    np.testing.assert_allclose(b["lower"], a["lower"], rtol=1e-12)
    np.testing.assert_allclose(b["upper"], a["upper"], rtol=1e-12)
    assert ooc.model.max_leverage == pytest.approx(mem.model.max_leverage, rel=1e-10)

    distributed = pytest.importorskip("distributed")
    from service.engine.executors import DaskExecutor

    ex = DaskExecutor("local", workers=2)
    try:
        assert len(ex.client.scheduler_info()["workers"]) == 2
        seen = []
        dist = tune_partitions(parts, schema, SPEC, executor=ex, progress=lambda a, b: seen.append((a, b)))
    finally:
        ex.close()
    assert_same(mem, dist)
    assert seen[-1][0] == seen[-1][1]
    assert dist.summary["executor"].startswith("dask")
    del distributed


def test_mae_and_grouped_out_of_core(tmp_path):
    d = data()
    d["site"] = (np.arange(len(d["y"])) % 40).astype(str)
    spec = {**SPEC, "bases": [{"kind": "polynomial", "degrees": [1, 2]}],
            "cv": {"scheme": "grouped", "group_by": "site", "folds": 4, "seed": 2, "assignment": "hash"},
            "selection": {"metric": "mae"}}
    mem = tune(d, spec)
    schema, parts = open_source(write_folder(tmp_path, d, files=2))
    ooc = tune_partitions(parts, schema, spec)
    assert_same(mem, ooc)


def test_csv_source_and_refusals(tmp_path):
    d = data(120)
    path = tmp_path / "d.csv"
    import pyarrow.csv as pcsv

    pcsv.write_csv(pa.table(d), path)
    schema, parts = open_source(path)
    assert schema["sex"] == "text" and schema["x0"] == "number"
    res = tune_partitions(parts, schema, {**SPEC, "bases": [{"kind": "linear"}]})
    assert_same(tune(d, {**SPEC, "bases": [{"kind": "linear"}]}), res)
    with pytest.raises(InvalidSpec, match="time_ordered"):
        tune_partitions(parts, schema, {"target": "y", "cv": {"scheme": "time_ordered", "order_by": "x0"}})
    with pytest.raises(InvalidSpec, match="shuffle"):
        tune_partitions(parts, schema, {"target": "y", "cv": {"assignment": "shuffle"}})
    bad = tmp_path / "ragged.csv"
    bad.write_text("a,b,y\n1,2,3\n4,5\n")
    with pytest.raises(InvalidData, match="ragged.csv"):
        s2, p2 = open_source(bad)
        tune_partitions(p2, s2, {"target": "y"})
    fake = tmp_path / "fake.parquet"
    fake.write_bytes(b"this is not parquet")
    with pytest.raises(InvalidData, match="not a readable Parquet file"):
        open_source(fake)


def test_nan_is_reported_with_its_row_in_the_whole_source(tmp_path):
    d = data()
    d["x2"] = d["x2"].copy()
    d["x2"][300] = np.nan
    schema, parts = open_source(write_folder(tmp_path, d))
    with pytest.raises(InvalidData, match=r"'x2'.*row\(s\) 300"):
        tune_partitions(parts, schema, SPEC)


def test_streaming_budget_counts_one_batch_of_design_not_every_row():
    from service.engine import Budget
    from service.engine.streaming import check_partitions
    from service.errors import BudgetExceeded

    schema = {"a": "number", "b": "number", "y": "number"}
    spec = {"target": "y", "bases": [{"kind": "polynomial", "degrees": [6]}], "execution": {"batch_rows": 10_000}}
    budget = Budget(max_design_cells=1_000_000)
    # 27 terms × 10,000-row batches fits; the same basis over 10 million rows in memory would not
    assert check_partitions(schema, spec, 10_000_000, budget)["widest_basis"] == 27
    with pytest.raises(BudgetExceeded, match="batch_rows"):
        check_partitions(schema, dict(spec, execution={"batch_rows": 100_000}), 10_000_000, budget)


def test_row_threads_do_not_change_the_result(tmp_path):
    # Row batches on two threads (BLAS held to one thread each) against one thread: the batches are merged
    # in input order, so the CV tables, the chosen point and the predictions agree to rounding
    # (the in-memory engine, checked against scikit-learn in test_reference.py, is the reference for both).
    d = data()
    schema, parts = open_source(write_folder(tmp_path, d, files=2, row_group=100))
    one = tune_partitions(parts, schema, SPEC, threads=1)
    two = tune_partitions(parts, schema, SPEC, threads=2)
    assert_same(one, two)
    rows = {k: v[:50] for k, v in d.items() if k != "y"}
    np.testing.assert_allclose(two.model.predict(rows), one.model.predict(rows), rtol=1e-12)
    assert one.summary["rows"] == two.summary["rows"] == len(d["y"])
    # every pass adds its batches up in input order whatever the threads (the scan's statistics, the folds'
    # factors, the last pass's residuals), so the stored artifacts are the same bits
    (b1, a1), (b2, a2) = one.to_artifact(), two.to_artifact()
    assert b1 == b2 and a1.keys() == a2.keys()
    assert all(np.array_equal(a1[k], a2[k]) for k in a1)
def test_row_key_hash_does_not_depend_on_the_storage_type():
    """A row key read as float64 (a CSV in memory) or int64 (elsewhere) or as a Python int lands in the same fold:
    the hash is of a canonical form (integer-valued numbers as integers). Non-integers keep their float64 bits
    and text its UTF-8 bytes, so 7.5 and "7" stay distinct keys (common practice for stable hashing)."""
    from service.engine.folds import hash_folds, key_hash

    ints = np.arange(-50, 5000, 7, dtype=np.int64)
    np.testing.assert_array_equal(key_hash(ints.astype(np.float64), 3), key_hash(ints, 3))
    np.testing.assert_array_equal(hash_folds(ints.astype(np.float64), 3, 5), hash_folds(ints, 3, 5))
    assert key_hash(np.array([7.5]), 3)[0] != key_hash(np.array([7]), 3)[0]
    assert key_hash(np.array(["7"], dtype=object), 3)[0] != key_hash(np.array([7]), 3)[0]
    assert key_hash(np.array([-0.0]), 3)[0] == key_hash(np.array([0]), 3)[0]


def test_splitmix64_gives_the_published_outputs_and_the_lanes_their_shared_keys():
    """SplitMix64 (Steele, Lea & Flood, OOPSLA 2014) seeded with 0 first outputs 0xE220A8397B1DCDAF, then
    0x6E789E6AA1B965F4 (the values from memory; the textbook expression this code replaced gave them too).
    A column's fingerprint lanes are the same with the row keys made for it or shared with other columns."""
    from service.engine.folds import splitmix64
    from service.engine.result import column_lanes, fingerprint_columns, lane_keys

    out = splitmix64(np.array([0, 0x9E3779B97F4A7C15], dtype=np.uint64))
    assert [int(v) for v in out] == [0xE220A8397B1DCDAF, 0x6E789E6AA1B965F4]
    x = np.arange(-3, 5, dtype=np.int64)
    assert np.array_equal(splitmix64(x), splitmix64(x.view(np.uint64))) and x[0] == -3  # its input untouched
    rng = np.random.default_rng(2)
    cols = {"a": rng.standard_normal(1000), "b": rng.integers(0, 5, 1000)}
    lanes = fingerprint_columns(cols, ["a", "b"], 77)
    for name in cols:
        assert np.array_equal(lanes[name], column_lanes(cols[name], 77))
        assert np.array_equal(lanes[name], column_lanes(cols[name], 77, lane_keys(77, 1000)))


def test_batches_larger_than_a_summary_chunk(tmp_path):
    # One 88,400-row batch: each fold's ~17,700 rows are more than a summary chunk (CHUNK_ROWS), so the
    # streamed pass absorbs them into the fold's running R factor chunk by chunk, while the in-memory
    # engine splits them its own way (Summary.of's segments): the same CV table to rounding.
    from service.engine.summaries import CHUNK_ROWS

    d = {k: np.tile(v, 200) for k, v in data().items()}  # the shipped rows, 200 times
    spec = {"target": "y", "features": ["x0", "x2", "x3"], "categorical": ["sex"],
            "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]}],
            "penalty": {"strengths": {"min": 1e-2, "max": 1e3, "count": 8}},
            "cv": {"folds": 5, "seed": 4, "assignment": "hash"}, "execution": {"batch_rows": 100_000}}
    assert len(d["y"]) / spec["cv"]["folds"] > CHUNK_ROWS
    mem = tune(d, spec)
    schema, parts = open_source(write_folder(tmp_path, d, files=1, row_group=100_000))
    assert_same(mem, tune_partitions(parts, schema, spec))


def test_dask_workers_run_blas_on_one_thread(monkeypatch):
    """Inside a task on a LocalCluster worker, BLAS runs on one thread (threadpoolctl reads the limit in
    effect from the loaded BLAS library itself), even under a Dask configuration that leaves the workers'
    BLAS threads free; a plain cluster under that configuration shows what the limit guards against."""
    pytest.importorskip("distributed")
    import dask
    from distributed import Client, LocalCluster

    from service.engine.executors import DaskExecutor
    from service.engine.parallel import usable_cores

    def blas_threads(_):
        from threadpoolctl import threadpool_info

        return sorted({i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"})

    free = {"distributed.nanny.pre-spawn-environ": {}}  # no OPENBLAS_NUM_THREADS=1 from Dask's nanny
    for name in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
        # nor from this process's environment, where an earlier LocalCluster's nanny leaves them behind
        monkeypatch.delenv(name, raising=False)
    with dask.config.set(free):
        ex = DaskExecutor("local", workers=1)
    try:
        assert ex.map_reduce(blas_threads, [0, 1], lambda a, b: sorted(set(a + b))) == [1]
    finally:
        ex.close()
    if usable_cores() > 1:
        with dask.config.set(free), LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                                                 dashboard_address=None, silence_logs=40) as cluster, \
                Client(cluster) as client:
            assert max(client.submit(blas_threads, 0, pure=False).result()) > 1
