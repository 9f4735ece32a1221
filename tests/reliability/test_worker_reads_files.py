"""A training file larger than a few blocks is parsed by the worker's training process, never by the API process.

At submission the API process reads a file's metadata and a bounded head (the Parquet footer; a CSV's first
1 MiB block, and its rows counted in 1 MiB blocks of one raw column up to ``max_training_rows``), refuses what
that shows with the in-memory reader's own problem, and leaves the file (an upload staged as sent, a source
fixed as a file reference) to the training process, which reads it whole with the same reader and checks it
with the same ``validate``. Peak memory of the real server process is measured as in test_bounded_cost.py:
``VmHWM`` in ``/proc/PID/status`` after writing ``5`` to ``/proc/PID/clear_refs`` (Linux proc(5)). The
reference for every problem is the in-memory reader itself (``service.api.intake.load_data`` and
``validate``, what the API process used to run), called here on the same file: a refusal the worker finds
must be the job's stored problem with the same body. The data are invented pump-station rows.
"""

from __future__ import annotations

import io
import json
import time
import types
from pathlib import Path

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.compute  # noqa: F401 (pa.compute)
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from procmem import peak_growth  # tests/procmem.py (tests/ is on pytest's pythonpath)

MiB = 2**20
BOUND = 100 * MiB  # what the API process may grow by while accepting one large file
CAP = 5_000_000  # the server's max_training_rows (the default)
BIG = 4_600_000  # rows of the large CSV source: ~190 MiB of CSV, 105 MiB as three float64 columns
SPEC = {"target": "energy_kwh", "features": ["flow_lps", "head_m"], "bases": [{"kind": "linear"}],
        "penalty": {"strengths": [0.01, 1.0]}, "cv": {"folds": 3, "seed": 1}, "execution": {"mode": "memory"}}
FINAL = {"succeeded", "failed", "cancelled"}


def pump_table(n: int, seed: int) -> pa.Table:
    rng = np.random.default_rng(seed)
    flow = rng.uniform(20, 120, n)
    head = rng.uniform(10, 60, n)
    energy = 0.02 * flow * head + rng.normal(0, 1, n)
    return pa.table({"flow_lps": flow, "head_m": head, "station": np.array(["mill-lane", "quarry"])[np.arange(n) % 2],
                     "energy_kwh": energy})


def csv_bytes(table: pa.Table) -> bytes:
    buf = io.BytesIO()
    pacsv.write_csv(table, buf)
    return buf.getvalue()


@pytest.fixture(scope="module")
def srv(tmp_path_factory, rk):
    root = tmp_path_factory.mktemp("worker-reads")
    settings = rk.base_settings(root, embedded_worker=True, log_level="warning", max_training_rows=CAP,
                                streaming_threshold_bytes=2**40)
    data = Path(settings["data_dir"])
    pacsv.write_csv(pump_table(BIG, 1), data / "big.csv")
    with rk.server_process(root, **{k: v for k, v in settings.items() if k not in ("store", "data_dir")},
                           store=settings["store"], data_dir=settings["data_dir"]) as server:
        warm = csv_bytes(pump_table(40_000, 2))  # over 1 MiB: the first large file imports what the intake needs
        r = httpx.post(f"{server.base}/v1/models/warm/trainings", timeout=300,
                       files={"file": ("warm.csv", warm)}, data={"spec": json.dumps(SPEC)})
        assert r.status_code == 202, r.text
        wait(server.base, r.json()["id"])
        yield server, data


def wait(base: str, job_id: str, deadline_s: float = 600.0) -> dict:
    """Poll a job until it ends (a readiness wait; it fails only if the job never ends)."""
    end = time.monotonic() + deadline_s
    while True:
        job = httpx.get(f"{base}/v1/trainings/{job_id}").json()
        if job["state"] in FINAL:
            return job
        assert time.monotonic() < end, job
        time.sleep(0.1)


def reference_problem(payload: bytes | Path, where: str, spec: dict, **limits) -> dict:
    """The problem the in-memory reader gives for this file (what the API process answered before)."""
    from service import tables
    from service.api import intake
    from service.engine import parse_spec
    from service.errors import TikhonError
    from service.problems import problem_from_error

    from service.settings import Settings

    settings = Settings(**{"max_training_rows": CAP, **limits})
    try:
        if isinstance(payload, Path):
            cols = tables.read_source(payload, where=where, max_label=settings.max_label_chars,
                                      spec=parse_spec(spec), max_rows=settings.max_training_rows)
        else:
            cols = tables.from_file_bytes(payload, "x.csv", where=where, max_label=settings.max_label_chars,
                                          spec=parse_spec(spec), max_rows=settings.max_training_rows)
        intake.validate(cols, spec, settings)
    except TikhonError as err:
        return problem_from_error(err)
    raise AssertionError("the reference reader accepted the file")


def same_problem(got: dict, want: dict) -> None:
    for key in ("status", "type", "title", "detail", "errors"):
        assert got.get(key) == want.get(key), (key, got.get(key), want.get(key))


def test_a_large_csv_source_in_memory_mode_is_read_by_the_worker(srv):
    server, _ = srv
    grew, r = peak_growth(server.pid, lambda: httpx.post(
        f"{server.base}/v1/models/big-source/trainings", timeout=300,
        json={"data": {"source": "big.csv"}, "spec": SPEC, "promote": "always"}))
    assert r.status_code == 202, r.text
    data = r.json()["data"]
    assert data["execution"] == "memory" and data["rows"] == BIG  # counted exactly, in bounded memory
    assert data["columns"] == ["flow_lps", "head_m", "energy_kwh"]
    assert grew < BOUND, f"the API process grew by {grew / MiB:.0f} MiB"
    job = wait(server.base, r.json()["id"])
    assert job["state"] == "succeeded", job
    version = httpx.get(f"{server.base}/v1/models/big-source/versions/1").json()
    assert version["data_fingerprint"]["rows"] == BIG


@pytest.mark.parametrize("kind", ["csv", "parquet"])
def test_a_large_upload_is_staged_as_sent_and_read_by_the_worker(srv, kind):
    """A CSV upload near max_body_bytes (64 MiB), and a Parquet upload of 4.9 million rows (values rounded to
    cents, so it is small): the API process saves and looks at them; the worker reads them. The API process
    that read them itself grew by about 200 MiB for each (benchmarks/bench_intake_memory.py)."""
    server, _ = srv
    if kind == "csv":  # nine numeric columns with one decimal: 1.3 M rows, 89 MiB as float64, in 55 MiB of CSV
        n = 1_300_000
        rng = np.random.default_rng(3)
        X = np.round(rng.uniform(10, 99, (n, 8)), 1)
        table = pa.table({**{f"x{j}": X[:, j] for j in range(8)}, "energy_kwh": np.round(X.sum(axis=1), 1)})
        payload = csv_bytes(table)
        assert 40 * MiB < len(payload) < 64 * MiB
        spec = dict(SPEC, features=[f"x{j}" for j in range(8)])
    else:
        n = CAP - 100_000
        spec = SPEC
        table = pump_table(n, 3)
        table = pa.table({c: (pa.compute.round(table[c], 2) if c != "station" else table[c]) for c in table.column_names})
        sink = pa.BufferOutputStream()
        pq.write_table(table, sink, row_group_size=500_000)
        payload = sink.getvalue().to_pybytes()
        assert len(payload) < 64 * MiB
    grew, r = peak_growth(server.pid, lambda: httpx.post(
        f"{server.base}/v1/models/big-upload-{kind}/trainings", timeout=300,
        files={"file": (f"june.{kind}", payload)}, data={"spec": json.dumps(spec), "promote": "always"}))
    assert r.status_code == 202, r.text
    assert r.json()["data"]["rows"] == n and r.json()["data"]["filename"] == f"june.{kind}"
    assert grew < BOUND, f"the API process grew by {grew / MiB:.0f} MiB"
    job = wait(server.base, r.json()["id"])
    assert job["state"] == "succeeded", job


def test_rows_past_the_limit_are_refused_at_submission_in_the_readers_words(srv):
    """The count stops at the first 1 MiB block past max_training_rows, where the in-memory reader stopped:
    the same 413 and the same 'at least N rows'."""
    server, data = srv
    path = data / "too-many.csv"
    pacsv.write_csv(pump_table(CAP + 200_000, 4), path)
    grew, r = peak_growth(server.pid, lambda: httpx.post(
        f"{server.base}/v1/models/too-many/trainings", timeout=300,
        json={"data": {"source": "too-many.csv"}, "spec": SPEC}))
    assert r.status_code == 413, r.text
    same_problem(r.json(), reference_problem(path, "data.source='too-many.csv'", SPEC))
    assert grew < BOUND, f"the API process grew by {grew / MiB:.0f} MiB"


def _with_cell(table: pa.Table, column: str, row: int, cell: str) -> bytes:
    lines = csv_bytes(table).split(b"\n")
    header = lines[0].decode().split(",")
    cells = lines[row + 1].split(b",")
    cells[header.index(f'"{column}"') if f'"{column}"' in header else header.index(column)] = cell.encode()
    lines[row + 1] = b",".join(cells)
    return b"\n".join(lines)


@pytest.mark.parametrize("case", ["malformed-late", "constant-target", "levels"])
def test_what_only_the_whole_table_shows_fails_the_job_with_the_same_problem(srv, case):
    """A malformed number past the first block, a constant target, too many levels of a categorical column:
    the worker's training process finds them, and the job's problem is the body the submission answered
    when the API process read the whole file (the reference reader, run here on the same bytes)."""
    server, data = srv
    n = 60_000  # ~2.5 MiB of CSV: larger than what the API process reads whole
    table = pump_table(n, 5)
    spec = dict(SPEC)
    if case == "malformed-late":
        payload = _with_cell(table, "head_m", n - 3, "1,234")
        payload = payload.replace(b"1,234", b'"1,234"')
    elif case == "constant-target":
        payload = csv_bytes(table.set_column(3, "energy_kwh", pa.array(np.full(n, 7.5))))
    else:
        labels = np.array([f"site-{i % 1000}" for i in range(n)], dtype=object)
        labels[-1] = "site-late"  # level 1,001 (max_levels is 1,000), past the first block
        payload = csv_bytes(table.set_column(2, "station", pa.array(labels)))
        spec = dict(SPEC, categorical=["station"])
    want = reference_problem(payload, "the uploaded file", spec)
    r = httpx.post(f"{server.base}/v1/models/late-{case}/trainings", timeout=300,
                   files={"file": ("late.csv", payload)}, data={"spec": json.dumps(spec)})
    assert r.status_code == 202, r.text
    job = wait(server.base, r.json()["id"])
    assert job["state"] == "failed", job
    same_problem(job["problem"], want)
    (data / f"late-{case}.csv").write_bytes(payload)
    r = httpx.post(f"{server.base}/v1/models/late-{case}-src/trainings", timeout=300,
                   json={"data": {"source": f"late-{case}.csv"}, "spec": spec})
    assert r.status_code == 202, r.text
    job = wait(server.base, r.json()["id"])
    assert job["state"] == "failed", job
    same_problem(job["problem"], reference_problem(data / f"late-{case}.csv", f"data.source='late-{case}.csv'", spec))


def test_a_malformed_cell_in_the_first_block_is_still_refused_at_submission(srv):
    server, data = srv
    n = 60_000
    payload = _with_cell(pump_table(n, 6), "flow_lps", 7, "0x1A")
    want = reference_problem(payload, "the uploaded file", SPEC)
    r = httpx.post(f"{server.base}/v1/models/early/trainings", timeout=300,
                   files={"file": ("early.csv", payload)}, data={"spec": json.dumps(SPEC)})
    assert r.status_code == 422, r.text
    same_problem(r.json(), want)


def test_if_better_scores_the_live_version_on_the_rows_the_training_process_read(srv):
    """promote if_better on a file the worker reads: the live version's figure on the new rows is computed by
    the training process (the API process, which embeds the worker here, never reads the rows) and is the
    RMSE per fold of the new job's folds, averaged (scikit-learn's mean_squared_error as the reference)."""
    from sklearn.metrics import mean_squared_error

    from service.engine import tune

    server, _ = srv
    spec = dict(SPEC, cv={"folds": 3, "seed": 1, "assignment": "hash"})
    first, second = csv_bytes(pump_table(60_000, 11)), csv_bytes(pump_table(60_000, 12))
    for payload, promote in ((first, "always"), (second, "if_better")):
        r = httpx.post(f"{server.base}/v1/models/better/trainings", timeout=300,
                       files={"file": ("m.csv", payload)}, data={"spec": json.dumps(spec), "promote": promote})
        assert r.status_code == 202, r.text
        assert r.json()["data"]["execution"] == "memory"  # read by the worker's training process
        job = wait(server.base, r.json()["id"])
        assert job["state"] == "succeeded", job
    decision = job["decision"]
    assert decision["live_version"] == 1 and decision["metric"] == "rmse"
    cols = [{c: np.asarray(t[c]) for c in ("flow_lps", "head_m", "energy_kwh")}
            for t in (pacsv.read_csv(io.BytesIO(first)), pacsv.read_csv(io.BytesIO(second)))]
    live = tune(cols[0], spec).model  # the live version, trained again here on the same rows
    folds = np.asarray(tune(cols[1], spec).fold_of_row)
    pred = live.predict({c: cols[1][c] for c in ("flow_lps", "head_m")})
    y = cols[1]["energy_kwh"]
    want = np.mean([mean_squared_error(y[folds == k], pred[folds == k]) ** 0.5 for k in range(3)])
    assert decision["live_on_new_data"] == pytest.approx(want, rel=1e-9)
