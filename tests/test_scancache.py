"""The scanned-column cache of a streamed job changes nothing but how later passes get their rows.

Reference: the same streamed training without the cache (itself equal to the in-memory engine, checked
against scikit-learn in tests/engine/test_reference.py). The data are the diabetes set that ships with
scikit-learn (Efron et al., 2004), written to Parquet and CSV here. Equality is exact: every CV value, the
chosen point and every array of the artifact bit for bit, since the cache gives back the very batches
the scan read.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.csv as pcsv
import pyarrow.parquet as pq
import pytest
from sklearn.datasets import load_diabetes

from service.engine.streaming import tune_partitions
from service.errors import InvalidData
from service.scancache import ScanCache
from service.sources import open_source

SPEC = {"target": "y", "features": ["x0", "x2", "x3", "x4"], "categorical": ["sex"],
        "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]},
                  {"kind": "rbf", "widths": [1.0, 2.0], "centers": 25}],
        "penalty": {"strengths": {"min": 1e-2, "max": 1e3, "count": 12}},
        "cv": {"folds": 5, "seed": 9, "assignment": "hash", "row_key": "id"}, "execution": {"batch_rows": 256}}


def data() -> dict[str, np.ndarray]:
    X, y = load_diabetes(return_X_y=True)
    d = {f"x{j}": X[:, j] for j in range(6)}
    d["sex"] = np.where(X[:, 1] > 0, "f", "m")  # a categorical column derived from the shipped data
    d["site"] = (np.arange(len(y)) % 40).astype(str)
    d["id"] = np.arange(len(y), dtype=np.int64) * 7 + 3
    d["y"] = y
    return d


def parquet_folder(tmp_path, d, files=3):
    folder = tmp_path / "parts"
    folder.mkdir()
    cuts = np.linspace(0, len(d["y"]), files + 1).astype(int)
    for i in range(files):
        pq.write_table(pa.table({k: v[cuts[i]:cuts[i + 1]] for k, v in d.items()}), folder / f"part-{i}.parquet",
                       row_group_size=50)
    return folder


def assert_identical(a, b):
    assert a.chosen == b.chosen
    assert [r["split_values"] for r in a.cv_table] == [r["split_values"] for r in b.cv_table]
    assert [r["mean"] for r in a.cv_table] == [r["mean"] for r in b.cv_table]
    body_a, arrays_a = a.to_artifact()
    body_b, arrays_b = b.to_artifact()
    assert sorted(arrays_a) == sorted(arrays_b)
    for k in arrays_a:
        np.testing.assert_array_equal(arrays_b[k], arrays_a[k], err_msg=k)


@pytest.mark.parametrize("case", ["parquet", "csv", "mae-grouped"])
def test_results_with_and_without_the_cache_are_identical(tmp_path, case):
    d = data()
    spec = SPEC
    if case == "csv":
        pcsv.write_csv(pa.table(d), tmp_path / "d.csv")
        source = tmp_path / "d.csv"
    else:
        source = parquet_folder(tmp_path, d)
    if case == "mae-grouped":
        spec = {**SPEC, "bases": [{"kind": "polynomial", "degrees": [1, 2]}], "selection": {"metric": "mae"},
                "cv": {"scheme": "grouped", "group_by": "site", "folds": 4, "seed": 2, "assignment": "hash"}}
    schema, parts = open_source(source)
    plain = tune_partitions(parts, schema, spec)
    folder = tmp_path / "scratch"
    folder.mkdir()
    with ScanCache(folder, 1 << 30) as cache:
        cached = tune_partitions(cache.wrap(parts), schema, spec)
        # reads of each partition: the scan, one summaries pass per basis group (nested degrees share one,
        # each RBF width has its own), the MAE pass when MAE selects, the last pass
        passes = 1 + 1 + 1 + 1 if case == "mae-grouped" else 1 + 3 + 1
        # the scan writes each partition once; every later pass maps it back; nothing decodes the source again
        assert cache.reads == {"written": len(parts), "mapped": len(parts) * (passes - 1), "source": 0}, cache.reads
        assert sorted(p.name for p in folder.iterdir()) == [f"part-{i}.arrow" for i in range(len(parts))]
        assert 0 < cache.used == sum(p.stat().st_size for p in folder.iterdir()) <= 1 << 30
    assert list(folder.iterdir()) == []  # close() removed its files
    assert_identical(plain, cached)


def test_the_size_setting_is_respected_and_the_rest_is_read_from_the_source(tmp_path):
    d = data()
    schema, parts = open_source(parquet_folder(tmp_path, d))
    plain = tune_partitions(parts, schema, SPEC)
    folder = tmp_path / "scratch"
    folder.mkdir()
    with ScanCache(folder, 1 << 30) as probe:  # the size of one partition's file
        list(probe.wrap(parts)[0].read(["y", "x0", "x2", "x3", "x4", "sex", "id"], 256))
        one = probe.used
    for limit, kept in [(one, 1), (2 * one + one // 2, 2), (one - 1, 0), (0, 0)]:
        with ScanCache(folder, limit) as cache:
            cached = tune_partitions(cache.wrap(parts), schema, SPEC)
            assert cache.used <= limit and len(cache.entries) == kept, (limit, cache.entries)
            assert len(list(folder.iterdir())) == kept  # no unfinished file is left behind
            if kept < len(parts):
                assert cache.reads["source"] > 0
        assert_identical(plain, cached)


def test_an_abandoned_or_failed_read_keeps_nothing(tmp_path):
    d = data()
    d["x2"] = d["x2"].copy()
    d["x2"][400] = np.nan  # in the last partition: the scan fails after caching the first two
    schema, parts = open_source(parquet_folder(tmp_path, d))
    folder = tmp_path / "scratch"
    folder.mkdir()
    with ScanCache(folder, 1 << 30) as cache:
        with pytest.raises(InvalidData, match=r"'x2'.*row\(s\) 400"):
            tune_partitions(cache.wrap(parts), schema, SPEC)
        assert sorted(p.name for p in folder.iterdir()) == ["part-0.arrow", "part-1.arrow"]
        reader = cache.wrap(parts)[0]
        batches = reader.read(["y", "x0"], 64)
        next(batches)
        batches.close()  # a pass stopped early (a cancel): its file is not kept
        assert sorted(p.name for p in folder.iterdir()) == ["part-0.arrow", "part-1.arrow"]
    assert list(folder.iterdir()) == []


def test_mapped_batches_are_the_scanned_ones_and_read_only(tmp_path):
    d = data()
    schema, parts = open_source(parquet_folder(tmp_path, d, files=1))
    folder = tmp_path / "scratch"
    folder.mkdir()
    columns = ["y", "x0", "sex", "id", "site"]
    with ScanCache(folder, 1 << 30) as cache:
        [part] = cache.wrap(parts)
        first = list(part.read(columns, 64))
        again = list(part.read(columns, 64))
        assert cache.reads == {"written": 1, "mapped": 1, "source": 0}
        assert [len(b["y"]) for b in first] == [len(b["y"]) for b in again]
        for a, b in zip(first, again):
            for c in columns:
                assert a[c].dtype == b[c].dtype and np.array_equal(a[c], b[c])
        assert isinstance(again[0]["sex"][0], str) and again[0]["sex"].dtype == object
        assert not again[0]["y"].flags.writeable  # a view of the mapped file, never written through
        # another batch size or a column the scan did not read: the source, as before
        assert len(list(part.read(columns, 32))) > len(first)
        list(part.read(["x5"], 64))
        assert cache.reads["source"] == 2


def test_a_scratch_folder_that_cannot_be_written_turns_the_cache_off(tmp_path):
    d = data()
    schema, parts = open_source(parquet_folder(tmp_path, d))
    plain = tune_partitions(parts, schema, SPEC)
    gone = tmp_path / "scratch-removed-meanwhile"  # as a full or failing disk: every write fails
    with ScanCache(gone, 1 << 30) as cache:
        cached = tune_partitions(cache.wrap(parts), schema, SPEC)
        assert cache.full and cache.entries == {} and cache.reads["mapped"] == 0 and cache.reads["source"] > 0
    assert not gone.exists()
    assert_identical(plain, cached)


def test_a_mapped_read_holds_its_batches_not_the_partition(tmp_path):
    """Reading a cached partition of 40 MB (1,000,000 rows × 5 float64 columns) in batches of 65,536 rows
    keeps only the batches in use resident: the peak growth of this process (VmHWM after clear_refs,
    proc(5)) stays far below the partition's size."""
    import os

    from procmem import peak_growth  # tests/procmem.py

    rng = np.random.default_rng(0)
    columns = ["a", "b", "c", "d", "y"]
    pq.write_table(pa.table({c: rng.standard_normal(1_000_000) for c in columns}), tmp_path / "wide.parquet",
                   row_group_size=1_000_000)
    _, parts = open_source(tmp_path / "wide.parquet")
    folder = tmp_path / "scratch"
    folder.mkdir()
    with ScanCache(folder, 1 << 30) as cache:
        [part] = cache.wrap(parts)
        for _ in part.read(columns, 65_536):
            pass
        assert cache.used > 40_000_000

        def mapped_pass():
            total = 0.0
            for batch in part.read(columns, 65_536):
                total += sum(float(batch[c].sum()) for c in columns)
            return total

        growth, _ = peak_growth(os.getpid(), mapped_pass)
        assert cache.reads["mapped"] == 1
        assert growth < 15_000_000, growth  # a few batches of 2.6 MB, never the partition's 40 MB
