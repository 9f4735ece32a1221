"""The API process checks a training file's size from its metadata before it parses a row.

A Parquet file's footer holds its row count (Apache Parquet format specification, FileMetaData.num_rows),
so a small, highly compressed file holding many rows is refused (in-memory training) or streamed (auto
mode) without decompressing it. Peak memory of the real server process is measured as in
test_bounded_cost.py: ``VmHWM`` in ``/proc/PID/status`` after writing ``5`` to ``/proc/PID/clear_refs``
(Linux proc(5)). The old code decompressed the whole table first (hundreds of MiB for these files).
"""

from __future__ import annotations

from pathlib import Path

import json

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from procmem import peak_growth  # tests/procmem.py (tests/ is on pytest's pythonpath)

MiB = 2**20
ROWS = 12_000_000  # above max_training_rows (5,000,000): 12 M rows x 3 float64 columns = 275 MiB as a table
BOUND = 64 * MiB  # what the API process may grow by while answering (the file itself is well under 1 MiB)


@pytest.fixture(scope="module")
def srv(tmp_path_factory, rk):
    root = tmp_path_factory.mktemp("intake-metadata")
    settings = rk.base_settings(root, embedded_worker=False, log_level="warning", streaming_threshold_bytes=64 * MiB)
    x = np.repeat(np.arange(ROWS // 1_000_000, dtype=np.float64), 1_000_000)  # runs of one value: compresses well
    table = pa.table({"flow_lps": x, "head_m": x * 2.0, "energy_kwh": x * 3.0 + 1.0})
    path = Path(settings["data_dir"]) / "many.parquet"
    pq.write_table(table, path, compression="zstd", row_group_size=1_000_000)
    del table, x
    assert path.stat().st_size < MiB
    with rk.server_process(root, **{k: v for k, v in settings.items() if k not in ("store", "data_dir")},
                           store=settings["store"], data_dir=settings["data_dir"]) as server:
        small = pa.table({"flow_lps": [1.0, 2.0, 3.0, 4.0], "head_m": [1.0, 3.0, 2.0, 5.0],
                          "energy_kwh": [1.0, 2.0, 2.5, 4.0]})
        sink = pa.BufferOutputStream()
        pq.write_table(small, sink)
        # warm up: the first upload imports what the intake needs
        httpx.post(f"{server.base}/v1/models/warm/trainings", timeout=120,
                   files={"file": ("small.parquet", sink.getvalue().to_pybytes())},
                   data={"spec": '{"target": "energy_kwh", "cv": {"folds": 2}}'})
        yield server, path


SPEC = '{"target": "energy_kwh", "features": ["flow_lps", "head_m"], "cv": {"folds": 3, "seed": 1}}'


def test_an_upload_holding_more_rows_than_allowed_is_refused_from_its_footer(srv):
    server, path = srv
    payload = path.read_bytes()
    grew, r = peak_growth(server.pid, lambda: httpx.post(
        f"{server.base}/v1/models/pumps/trainings", timeout=300,
        files={"file": ("many.parquet", payload)}, data={"spec": SPEC}))
    assert r.status_code == 413, r.text
    assert f"{ROWS} rows" in r.json()["detail"] and "max_training_rows" in r.json()["detail"]
    assert grew < BOUND, f"the API process grew by {grew / MiB:.0f} MiB"


def test_a_source_in_memory_mode_is_refused_from_its_footer(srv):
    server, _ = srv
    spec = SPEC[:-1] + ', "execution": {"mode": "memory"}}'
    grew, r = peak_growth(server.pid, lambda: httpx.post(
        f"{server.base}/v1/models/pumps/trainings", timeout=300,
        json={"data": {"source": "many.parquet"}, "spec": json.loads(spec)}))
    assert r.status_code == 413, r.text
    assert grew < BOUND, f"the API process grew by {grew / MiB:.0f} MiB"


def test_auto_mode_streams_a_small_file_that_holds_a_large_table(srv):
    """Rows x width from the footer (12 M x 3 x 8 bytes = 275 MiB, above the server's 64 MiB
    streaming_threshold_bytes) decides streaming, not the file's bytes (under 1 MiB)."""
    server, _ = srv
    grew, r = peak_growth(server.pid, lambda: httpx.post(
        f"{server.base}/v1/models/pumps/trainings", timeout=300,
        json={"data": {"source": "many.parquet"}, "spec": json.loads(SPEC)}))
    assert r.status_code == 202, r.text
    assert r.json()["data"]["execution"] == "streaming" and r.json()["data"]["rows"] == ROWS
    assert grew < BOUND, f"the API process grew by {grew / MiB:.0f} MiB"
