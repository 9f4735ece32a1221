"""Submit one table through every data path of the training route and report each verdict.

Paths: JSON rows, CSV text (``data.csv``), a multipart upload, and a ``source`` file in the data folder,
CSV or Parquet, read in memory or streamed (``execution.mode``). Used by tests/api/test_one_reader.py.
"""

from __future__ import annotations

import io
import itertools
import json

import httpx
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

PATHS = ("rows", "csv", "upload", "csv_source_memory", "csv_source_streamed",
         "parquet_source_memory", "parquet_source_streamed")
_names = itertools.count()


def csv_text(table: pa.Table) -> str:
    buf = io.BytesIO()
    pacsv.write_csv(table, buf)
    return buf.getvalue().decode()


def submit(base: str, data_dir, path: str, spec: dict, *, csv: str | bytes | None = None,
           table: pa.Table | None = None, rows: list | None = None, parquet: pa.Table | None = None) -> httpx.Response | None:
    """POST a training of a fresh model through ``path``. ``csv`` is the CSV text (or bytes) of the data
    (used by the CSV paths), ``parquet`` the Arrow table for the Parquet paths, ``rows`` the JSON rows."""
    name = f"m{next(_names)}"
    url = f"{base}/v1/models/{name}/trainings"
    mode = "streaming" if path.endswith("streamed") else "memory"
    spec = dict(spec, execution=dict(spec.get("execution") or {}, mode=mode))
    if path == "rows":
        return httpx.post(url, json={"data": {"rows": rows}, "spec": spec, "promote": "always"}, timeout=120)
    raw = csv.encode("utf-8") if isinstance(csv, str) else csv
    if path == "csv":
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError:
            return None  # JSON text is Unicode: bytes that are not UTF-8 cannot travel as data.csv
        return httpx.post(url, json={"data": {"csv": text}, "spec": spec, "promote": "always"}, timeout=120)
    if path == "upload":
        return httpx.post(url, files={"file": ("data.csv", raw, "text/csv")},
                          data={"spec": json.dumps(spec), "promote": "always"}, timeout=120)
    if path.startswith("csv_source"):
        fname = f"{name}.csv"
        (data_dir / fname).write_bytes(raw)
    else:
        fname = f"{name}.parquet"
        pq.write_table(parquet, data_dir / fname, row_group_size=max(1, parquet.num_rows // 3))
    return httpx.post(url, json={"data": {"source": fname}, "spec": spec, "promote": "always"}, timeout=120)
