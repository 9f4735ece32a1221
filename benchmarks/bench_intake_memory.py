"""Intake memory: how much the API process grows while it accepts one training submission, per data path.

A real server (``service.api.server.run``, what ``tikhon serve`` runs; embedded worker off, so the jobs stay
queued and the figures are the API process's own) is started on 127.0.0.1 over a temporary store and data
folder. Each submission is sent once, after a warm-up of every path with small data; the API process's
peak resident memory over it is ``VmHWM`` from ``/proc/PID/status`` after writing ``5`` to
``/proc/PID/clear_refs`` (Linux proc(5)), minus its ``VmRSS`` before. The intake process (a child of the
API process that reads JSON bodies above ``intake_process_bytes``) is reported apart, as its own peak.

``--code DIR`` runs the server from another checkout (e.g. the previous commit's worktree), so the old and
new intake can be measured side by side with the same data. The data are invented pump-station rows.

Last line: ``<path>_mb=<growth> ...`` for every path, and ``worst_api_growth_mb=<m>``.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[1]
MiB = 2**20
SPEC = {"target": "energy_kwh", "features": ["flow_lps", "head_m"], "bases": [{"kind": "linear"}],
        "penalty": {"strengths": [0.01, 1.0]}, "cv": {"folds": 3, "seed": 1}}


def pump_table(n: int, seed: int, cents: bool = False) -> pa.Table:
    rng = np.random.default_rng(seed)
    flow, head = rng.uniform(20, 120, n), rng.uniform(10, 60, n)
    energy = 0.02 * flow * head + rng.normal(0, 1, n)
    t = pa.table({"flow_lps": flow, "head_m": head, "energy_kwh": energy})
    return pa.table({c: pc.round(t[c], 2) for c in t.column_names}) if cents else t


def csv_bytes(t: pa.Table) -> bytes:
    buf = io.BytesIO()
    pacsv.write_csv(t, buf)
    return buf.getvalue()


def parquet_bytes(t: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pq.write_table(t, sink, row_group_size=500_000)
    return sink.getvalue().to_pybytes()


def status(pid: int, field: str) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) * 1024
    return 0


def children(pid: int) -> list[int]:
    out = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        try:
            out += [int(c) for c in (task / "children").read_text().split()]
        except OSError:
            pass
    return out


def start(code: Path, settings: dict[str, str], log: Path) -> tuple[subprocess.Popen, str]:
    from bench_soak import start_server  # benchmarks/ is on sys.path when a script there runs

    return start_server(settings, log, code=code)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--code", type=Path, default=ROOT, help="checkout whose server is measured")
    ap.add_argument("--rows", type=int, default=4_600_000, help="rows of the large sources (max_training_rows 5 M)")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="bench-intake-") as tmp:
        root = Path(tmp)
        data = root / "data"
        data.mkdir()
        settings = {"store": str(root / "store"), "data_dir": str(data), "log_level": "warning",
                    "embedded_worker": "false", "host": "127.0.0.1", "max_queued_jobs": "1000",
                    "max_queued_jobs_per_key": "1000"}
        big = pump_table(args.rows, 1)
        pacsv.write_csv(big, data / "big.csv")
        pq.write_table(pump_table(args.rows, 1, cents=True), data / "big.parquet", row_group_size=500_000)
        pacsv.write_csv(pump_table(2_000, 2), data / "small.csv")
        rng = np.random.default_rng(3)  # nine numeric columns with one decimal: 1.3 M rows in 55 MiB of CSV
        X = np.round(rng.uniform(10, 99, (1_300_000, 8)), 1)
        upload_csv = csv_bytes(pa.table({**{f"x{j}": X[:, j] for j in range(8)}, "energy_kwh": X.sum(axis=1).round(1)}))
        del X
        upload_pq = parquet_bytes(pump_table(args.rows, 3, cents=True))
        rows37 = pump_table(500_000, 4).to_pylist()  # a ~37 MB JSON body
        rows_small = pump_table(9_000, 5).to_pylist()  # ~0.9 MB: read in the API process (thread)
        csv_text = csv_bytes(pump_table(400_000, 6)).decode()
        del big
        cases = [
            ("json_rows_0.9mb", "API process (thread)", {"json": {"data": {"rows": rows_small}, "spec": SPEC}}),
            ("json_rows_37mb", "intake process", {"json": {"data": {"rows": rows37}, "spec": SPEC}}),
            ("json_csv_text", "intake process", {"json": {"data": {"csv": csv_text}, "spec": SPEC}}),
            ("upload_csv", "worker", {"files": {"file": ("june.csv", upload_csv)},
                                      "data": {"spec": json.dumps(dict(SPEC, features=[f"x{j}" for j in range(8)]))}}),
            ("upload_parquet", "worker", {"files": {"file": ("june.parquet", upload_pq)},
                                          "data": {"spec": json.dumps(SPEC)}}),
            ("source_csv_memory", "worker", {"json": {"data": {"source": "big.csv"},
                                                      "spec": dict(SPEC, execution={"mode": "memory"})}}),
            ("source_parquet_memory", "worker", {"json": {"data": {"source": "big.parquet"},
                                                          "spec": dict(SPEC, execution={"mode": "memory"})}}),
            ("source_csv_streamed", "worker (row batches)", {"json": {"data": {"source": "big.csv"},
                                                                      "spec": dict(SPEC, execution={"mode": "streaming"})}}),
        ]
        sizes = {"upload_csv": len(upload_csv), "upload_parquet": len(upload_pq),
                 "source_csv_memory": (data / "big.csv").stat().st_size,
                 "source_parquet_memory": (data / "big.parquet").stat().st_size,
                 "source_csv_streamed": (data / "big.csv").stat().st_size}
        proc, base = start(args.code, settings, root / "server.log")
        try:
            warm = [{"json": {"data": {"rows": pump_table(20, 7).to_pylist()}, "spec": SPEC}},
                    {"json": {"data": {"rows": pump_table(20_000, 7).to_pylist()}, "spec": SPEC}},
                    {"files": {"file": ("w.csv", csv_bytes(pump_table(40_000, 8)))}, "data": {"spec": json.dumps(SPEC)}},
                    {"files": {"file": ("w.parquet", parquet_bytes(pump_table(40_000, 8)))},
                     "data": {"spec": json.dumps(SPEC)}},
                    {"json": {"data": {"source": "small.csv"}, "spec": SPEC}}]
            for i, kw in enumerate(warm):
                httpx.post(f"{base}/v1/models/warm{i}/trainings", timeout=300, **kw)
            print(f"{'path':24} {'parsed where':22} {'bytes':>10} {'status':>6} {'API growth MiB':>15} "
                  f"{'intake MiB':>10} {'seconds':>8}")
            out = {}
            for i, (name, where, kw) in enumerate(cases):
                size = sizes.get(name) or len(json.dumps(kw.get("json")).encode())
                Path(f"/proc/{proc.pid}/clear_refs").write_text("5")
                kids = children(proc.pid)
                for k in kids:
                    Path(f"/proc/{k}/clear_refs").write_text("5")
                before = status(proc.pid, "VmRSS")
                t0 = time.perf_counter()
                r = httpx.post(f"{base}/v1/models/case{i}/trainings", timeout=600, **kw)
                took = time.perf_counter() - t0
                grew = (status(proc.pid, "VmHWM") - before) / MiB
                intake = max([status(k, "VmHWM") / MiB for k in children(proc.pid)] or [0.0])
                out[name] = grew
                print(f"{name:24} {where:22} {size:>10,} {r.status_code:>6} {grew:>15.1f} {intake:>10.0f} {took:>8.2f}")
        finally:
            proc.terminate()
            proc.wait(30)
    print(f"load average: {os.getloadavg()[0]:.2f}")
    print(" ".join(f"{k.replace('.', '_')}_mb={v:.0f}" for k, v in out.items())
          + f" worst_api_growth_mb={max(out.values()):.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
