"""One reader, one type rule, one verdict: the same table through every data path of the training route.

Paths (``paths.PATHS``): JSON rows, CSV text, a multipart upload, and a ``source`` in the data folder, CSV or
Parquet, read in memory or streamed. The same rows must give the same category levels, the same data
fingerprint and the same CV table on every path, and the same refusal (HTTP 422 at submission) where
they are refused. References: the CSV format of RFC 4180 (a cell is text; ``01`` and ``1`` are different
strings); IEEE 754 binary64 (the nearest double of a decimal text, which a decimal column must give too);
the rest is common practice for a data intake (a malformed cell is named with its row and value, never
dropped silently). The rows are invented (generated here with a fixed seed).
"""

from __future__ import annotations

from decimal import Decimal

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import datapaths as paths  # tests/datapaths.py (tests/ is on pytest's pythonpath)

SPEC = {"target": "y", "bases": [{"kind": "linear"}], "penalty": {"strengths": {"min": 1e-3, "max": 1e2, "count": 5}},
        "cv": {"folds": 3, "seed": 1, "assignment": "hash"}}
N = 60


@pytest.fixture(scope="module")
def svc(tmp_path_factory, kit):
    with kit.service(tmp_path_factory.mktemp("reader"), worker=True) as s:
        yield s


def outcome(base: str, r: httpx.Response | None, kit) -> dict:
    """What a path answered: "n/a", a refusal (status, detail, errors) or a version (levels, fingerprint, CV)."""
    if r is None:
        return {"verdict": "n/a"}
    if r.status_code != 202:
        body = r.json()
        return {"verdict": r.status_code, "detail": body["detail"], "errors": body.get("errors")}
    job = kit.wait_job(base, r.json()["id"])
    if job["state"] != "succeeded":
        return {"verdict": job["state"], "detail": job["problem"]["detail"]}
    name = job["model"]
    meta = httpx.get(f"{base}/v1/models/{name}/versions/1").json()
    cv = httpx.get(f"{base}/v1/models/{name}/versions/1/cv?view=all").json()
    return {"verdict": "trained", "schema": meta["feature_schema"], "fingerprint": meta["data_fingerprint"]["sha256"],
            "rows": meta["data_fingerprint"]["rows"], "split_values": [row["split_values"] for row in cv["table"]]}


def every_path(svc, kit, spec, *, csv, rows, parquet, only=paths.PATHS) -> dict[str, dict]:
    base, _, settings = svc
    return {p: outcome(base, paths.submit(base, settings.data_dir, p, spec, csv=csv, rows=rows, parquet=parquet), kit)
            for p in only}


def mixed_table():
    """x (number), zip (labels that look like numbers), when (a date, unused), flag (a boolean, unused),
    dec (a decimal number in Parquet; its decimal text in CSV; a JSON number), y (the target)."""
    rng = np.random.default_rng(17)
    zips = ["01", "1", "02", "007"] * (N // 4)
    x = rng.uniform(0, 10, N)
    dec = [Decimal(f"{v:.2f}") for v in rng.uniform(0, 30, N)]
    shift = {"01": 0.0, "1": 5.0, "02": 10.0, "007": 20.0}
    y = 2 * x + 0.3 * np.array([float(d) for d in dec]) + np.array([shift[z] for z in zips]) + rng.normal(0, 1, N)
    when = pa.array(np.datetime64("2024-01-01") + np.arange(N).astype("timedelta64[D]"))
    flag = (x > 5).tolist()
    table = pa.table({"x": x, "zip": pa.array(zips), "when": when, "flag": pa.array(flag),
                      "dec": pa.array(dec, pa.decimal128(6, 2)), "y": y})
    rows = [{"x": float(a), "zip": z, "when": str(w), "flag": f, "dec": float(str(d)), "y": float(b)}
            for a, z, w, f, d, b in zip(x, zips, when.to_pylist(), flag, dec, y)]
    return table, rows


def test_the_same_rows_train_the_same_model_on_every_path(svc, kit):
    """Items 7, 10, 11: categorical labels stay text (4 levels of zip everywhere, not 3 from CSV); unused date and
    boolean columns are ignored everywhere; a decimal column reads as the nearest doubles of its decimal text;
    the data fingerprint, the CV table and the schema are equal on all seven paths."""
    table, rows = mixed_table()
    spec = dict(SPEC, features=["x", "dec"], categorical=["zip"])
    got = every_path(svc, kit, spec, csv=paths.csv_text(table), rows=rows, parquet=table)
    first = got["rows"]
    assert first["verdict"] == "trained", first
    zip_schema = next(c for c in first["schema"] if c["name"] == "zip")
    assert zip_schema["levels"] == ["007", "01", "02", "1"]  # RFC 4180: cells are text; four distinct labels
    for path, o in got.items():
        assert o["verdict"] == "trained", (path, o)
        assert o["schema"] == first["schema"], path
        assert o["fingerprint"] == first["fingerprint"], path
        assert o["rows"] == N
        np.testing.assert_allclose(o["split_values"], first["split_values"], rtol=1e-12, err_msg=path)


def test_the_fingerprint_does_not_depend_on_how_a_folder_is_cut(svc, kit):
    """Item 10: the same rows as one file, as 2 files and as 5 files with other row groups: one fingerprint."""
    base, _, settings = svc
    table, rows = mixed_table()
    spec = dict(SPEC, features=["x", "dec"], categorical=["zip"], execution={"mode": "streaming"})
    prints = set()
    for files in (2, 5):
        folder = settings.data_dir / f"cut{files}"
        folder.mkdir()
        cuts = np.linspace(0, N, files + 1).astype(int)
        for i in range(files):
            pq.write_table(table.slice(cuts[i], cuts[i + 1] - cuts[i]), folder / f"part-{i}.parquet", row_group_size=7)
        o = outcome(base, httpx.post(f"{base}/v1/models/cut{files}/trainings",
                                     json={"data": {"source": f"cut{files}"}, "spec": spec, "promote": "always"}), kit)
        assert o["verdict"] == "trained", o
        prints.add(o["fingerprint"])
    one = outcome(base, paths.submit(base, settings.data_dir, "rows", spec, rows=rows), kit)
    prints.add(one["fingerprint"])
    assert len(prints) == 1


def numeric_with(bad: str):
    rng = np.random.default_rng(5)
    x, z = rng.uniform(0, 10, N), rng.uniform(0, 5, N)
    y = 2 * x - z + rng.normal(0, 1, N)
    cells = [repr(float(v)) for v in z]
    cells[7] = bad
    quoted = ['"' + c + '"' if "," in c else c for c in cells]
    csv = "x,z,y\n" + "".join(f"{float(a)!r},{c},{float(b)!r}\n" for a, c, b in zip(x, quoted, y))
    table = pa.table({"x": x, "z": pa.array(cells), "y": y})
    rows = [{"x": float(a), "z": (float(c) if i != 7 else c), "y": float(b)} for i, (a, c, b) in enumerate(zip(x, cells, y))]
    return csv, rows, table


@pytest.mark.parametrize("bad", ["1,234", "0x1A", "-"])
def test_one_malformed_cell_is_refused_by_column_row_and_value(svc, kit, bad):
    """Item 8: a column of numbers with one malformed cell is not turned into text and dropped from the default
    features (the model would train without it, silently): every path answers 422 naming column, row, value."""
    csv, rows, table = numeric_with(bad)
    got = every_path(svc, kit, SPEC, csv=csv, rows=rows, parquet=table)
    for path, o in got.items():
        assert o["verdict"] == 422, (path, o)
        assert "'z'" in o["detail"] and repr(bad) in o["detail"] and "row 7" in o["detail"], (path, o["detail"])
    for path in paths.PATHS[1:]:
        assert got[path]["errors"][0]["row"] == 7 and got[path]["errors"][0]["value"] == bad


def test_the_same_refusals_on_every_path(svc, kit):
    """Item 11: a boolean or a date used as a feature, an empty label, a missing row key: refused with a 422 on
    every path (rows and Parquet carry their own types, so a few messages differ in wording, never in verdict)."""
    table, rows = mixed_table()
    csv = paths.csv_text(table)
    for spec, needle in ((dict(SPEC, features=["x", "flag"]), "true/false"),
                         (dict(SPEC, features=["x", "when"]), "'when'")):
        for path, o in every_path(svc, kit, spec, csv=csv, rows=rows, parquet=table).items():
            assert o["verdict"] == 422 and needle in o["detail"], (path, o)
    labels = table.column("zip").to_pylist()
    labels[4] = ""
    blank = table.set_column(1, "zip", pa.array(labels))
    blank_rows = [dict(r, zip=v) for r, v in zip(rows, labels)]
    got = every_path(svc, kit, dict(SPEC, features=["x"], categorical=["zip"]), csv=paths.csv_text(blank),
                     rows=blank_rows, parquet=blank)
    for path, o in got.items():
        assert o["verdict"] == 422 and "'zip'" in o["detail"] and "4" in o["detail"], (path, o)
    keys = np.arange(N, dtype=float)
    keys[5] = np.nan
    keyed = table.append_column("k", pa.array(keys))
    key_rows = [dict(r, k=(None if i == 5 else float(i))) for i, r in enumerate(rows)]
    spec = dict(SPEC, features=["x"], cv=dict(SPEC["cv"], row_key="k"))
    for path, o in every_path(svc, kit, spec, csv=paths.csv_text(keyed), rows=key_rows, parquet=keyed).items():
        assert o["verdict"] == 422 and "5" in o["detail"], (path, o)


def test_text_that_is_not_utf8_is_refused_the_same_way(svc, kit):
    """Item 11: Latin-1 bytes in a label column (a CSV saved in a legacy encoding) are refused on every CSV path
    with the same advice, never decoded to replacement characters; JSON and Parquet carry Unicode text."""
    rng = np.random.default_rng(2)
    x = rng.uniform(0, 10, N)
    y = 2 * x + rng.normal(0, 1, N)
    raw = ("x,site,y\n" + "".join(f"{float(a)!r},{s},{float(b)!r}\n"
                                  for a, s, b in zip(x, ["café", "thé", "eau"] * (N // 3), y))).encode("latin-1")
    spec = dict(SPEC, features=["x"], categorical=["site"])
    got = every_path(svc, kit, spec, csv=raw, rows=None, parquet=None, only=paths.PATHS[1:5])
    assert got["csv"]["verdict"] == "n/a"  # JSON text is Unicode: such bytes cannot be sent as data.csv
    for path in paths.PATHS[2:5]:
        assert got[path]["verdict"] == 422 and "not UTF-8" in got[path]["detail"], (path, got[path])


def test_a_header_only_csv_says_it_has_no_rows(svc, kit):
    """Item 13: a CSV with a header and no rows is reported as such on every CSV path (not as 'bases need a
    numeric feature')."""
    got = every_path(svc, kit, SPEC, csv="x,y\n", rows=None, parquet=None, only=paths.PATHS[1:5])
    for path, o in got.items():
        assert o["verdict"] == 422 and "has a header but no rows" in o["detail"], (path, o)


def test_integers_then_decimals_after_the_first_block_train_in_memory_and_streamed(svc, kit):
    """Items 9 and 11: a CSV whose column holds integers for its first block (1 MiB) and 55.5 after it trains
    streamed as in memory; its integer row_key gives the same folds both ways (a key read as 7.0 or as 7
    hashes alike), so the CV tables are equal."""
    base, _, settings = svc
    n = 120_000
    rng = np.random.default_rng(8)
    a = rng.integers(0, 100, n).astype(float)
    a[-1] = 55.5  # after the first block of integers
    y = 0.5 * a + rng.normal(0, 1, n)
    lines = [f"{i},{int(v) if v.is_integer() else float(v)!r},{float(t)!r}\n" for i, (v, t) in enumerate(zip(a, y))]
    csv = "key,a,y\n" + "".join(lines)
    assert len(csv.encode()) > 2 * (1 << 20)
    spec = dict(SPEC, cv=dict(SPEC["cv"], row_key="key"))
    got = every_path(svc, kit, spec, csv=csv, rows=None, parquet=None, only=("csv_source_memory", "csv_source_streamed"))
    mem, streamed = got["csv_source_memory"], got["csv_source_streamed"]
    assert mem["verdict"] == "trained" and streamed["verdict"] == "trained", got
    assert mem["fingerprint"] == streamed["fingerprint"]
    np.testing.assert_allclose(streamed["split_values"], mem["split_values"], rtol=1e-10)
