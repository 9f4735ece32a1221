"""Pressure: single-row prediction latency and the server's peak memory while hostile requests arrive.

A real server (``service.api.server.run``, what ``tikhon serve`` runs; embedded worker off, so the
figures are the API process's own) is started on 127.0.0.1 over a temporary store holding three
models trained on the invented pump-station scenario: ``pumps`` (numeric inputs), ``stations`` (with the
station as a category) and ``wide`` (6 inputs at polynomial degree 4, 209 basis terms).

1. **quiet**: ``wrk`` (a compiled load generator, so the harness does not measure its own client) sends
   single-row predictions to ``pumps`` for ``--quiet-s`` seconds with ``--connections`` connections;
2. **pressure**: the same ``wrk`` run again while ``--hostile-workers`` threads of this script send, in
   a loop, the hostile-but-valid requests of issue 12: a 100,000-row predict CSV with one 20,000-character
   label; training data with a new level on every one of 20,000 rows; a 100,000-row batch on the wide
   model; ``/metrics`` scrapes; a spec carrying a 20 MB string; a two-fit RBF job with 4,000 centres on
   20,000 rows; a flood of small training submissions (until the queue limit answers 429); a 37 MB JSON
   training body. Each answer's status is tallied (refusals are expected: 413, 422, 429).
3. The server's peak resident memory is ``VmHWM`` from ``/proc/PID/status`` at the end (the peak over
   the process's whole life, start-up and quiet phase included): ``hostile_peak_rss_mb`` is the API
   process's; ``family_peak_rss_mb`` adds the processes it started (the intake process reading large
   JSON training bodies, the prediction process answering large batches, multiprocessing's tracker).

wrk reports latency percentiles of completed requests (closed loop: ``--connections`` requests in flight).
Request counts are bounded by the durations; only loopback addresses are used. The wrk client uses one
thread; the hostile senders build their bodies once, before the run.

Last line: ``hostile_peak_rss_mb=<m> predict_p99_ms_under_pressure=<p> predict_p99_ms_quiet=<q>
family_peak_rss_mb=<all processes>``.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from pathlib import Path

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_soak import SPEC, demo_columns, start_server  # noqa: E402

WIDE = [f"x{i}" for i in range(6)]
PROBE = {"rows": [{"flow_lps": 55.5, "head_m": 31.25}]}


def prepare(root: Path) -> dict[str, str]:
    from service.demo import pump_stations
    from service.engine import tune
    from service.settings import Settings
    from service.store import Store

    (root / "data").mkdir(parents=True, exist_ok=True)
    settings = {"store": str(root / "store"), "data_dir": str(root / "data"), "log_level": "warning",
                "embedded_worker": "false", "host": "127.0.0.1"}
    store = Store(Settings(**settings))
    d = pump_stations(1500, seed=1)
    models = {
        "pumps": (demo_columns(2000, seed=1), SPEC),
        "stations": ({k: d[k] for k in ("station", "flow_lps", "head_m", "energy_kwh")},
                     {"target": "energy_kwh", "features": ["flow_lps", "head_m"], "categorical": ["station"],
                      "bases": [{"kind": "linear"}], "penalty": {"kind": "l2", "strengths": [0.01, 1.0]},
                      "cv": {"folds": 3, "seed": 1}}),
    }
    rng = np.random.default_rng(2)
    X = rng.normal(size=(500, len(WIDE)))
    wide = {f: X[:, j] for j, f in enumerate(WIDE)}
    wide["y"] = X.sum(axis=1) + rng.normal(scale=0.1, size=500)
    models["wide"] = (wide, {"target": "y", "features": WIDE, "bases": [{"kind": "polynomial", "degrees": [4]}],
                             "penalty": {"kind": "l2", "strengths": [1.0, 10.0]}, "cv": {"folds": 3, "seed": 2}})
    for name, (cols, spec) in models.items():
        body, arrays = tune(cols, spec).to_artifact()
        store.set_live(name, store.publish(name, body, arrays)["version"], actor="bench", reason="pressure set-up")
    store.close()
    return settings


def hostile_requests() -> list[tuple[str, str, dict]]:
    """(label, path, httpx keyword arguments) of each hostile request, bodies built once."""
    rng = np.random.default_rng(5)
    lines = [b"station,flow_lps,head_m"] + [b"mill-lane,70,35"] * 100_000
    lines[50_000] = b"x" * 20_000 + b",70,35"
    long_label = b"\n".join(lines) + b"\n"
    levels = "site,flow_lps,energy_kwh\n" + "".join(f"s{i:05d},{10 + i % 80},{50 + i % 300}\n" for i in range(20_000))
    level_spec = {"target": "energy_kwh", "features": ["flow_lps"], "categorical": ["site"], "bases": [{"kind": "linear"}],
                  "penalty": {"kind": "l2", "strengths": [1.0]}, "cv": {"folds": 3}}
    Xw = rng.normal(size=(100_000, len(WIDE)))
    out = io.StringIO()
    out.write(",".join(WIDE) + "\n")
    np.savetxt(out, Xw, delimiter=",", fmt="%.5f")
    wide_csv = out.getvalue().encode()
    quick = {"target": "energy_kwh", "features": ["flow_lps", "head_m"], "bases": [{"kind": "linear"}],
             "penalty": {"kind": "l2", "strengths": [0.1, 1.0]}, "cv": {"folds": 3}}
    small_rows = [{"flow_lps": 10.0 + i, "head_m": 20.0 + i % 5, "energy_kwh": 30.0 + 2 * i} for i in range(30)]
    huge_spec = json.dumps({"data": {"rows": small_rows}, "spec": {**quick, "units": {"energy_kwh": "k" * (20 * 2**20)}}})
    rbf_csv = "flow_lps,head_m,energy_kwh\n" + "".join(f"{a:.3f},{b:.3f},{c:.3f}\n"
                                                      for a, b, c in rng.uniform(1, 100, size=(20_000, 3)))
    rbf_spec = {**quick, "bases": [{"kind": "rbf", "widths": [1.0], "centers": 4_000}], "penalty": {"kind": "l2", "strengths": [1.0]},
                "cv": {"folds": 2}}
    big_rows = [{"flow_lps": float(i % 97), "head_m": float(i % 31), "energy_kwh": float(i % 211)} for i in range(650_000)]
    big_json = json.dumps({"data": {"rows": big_rows}, "spec": quick}).encode()
    csv_h = {"content-type": "text/csv"}
    json_h = {"content-type": "application/json"}
    return [  # the quick refusals first, so every kind arrives within a short run
        ("metrics", "/metrics", {}),
        ("huge_spec_string", "/v1/models/pumps/trainings", {"content": huge_spec.encode(), "headers": json_h}),
        ("costly_rbf", "/v1/models/pumps/trainings", {"json": {"data": {"csv": rbf_csv}, "spec": rbf_spec}}),
        ("queue_flood", "/v1/models/pumps/trainings", {"json": {"data": {"rows": small_rows}, "spec": quick}}),
        ("long_label", "/v1/models/stations/predictions", {"content": long_label, "headers": csv_h}),
        ("new_level_every_row", "/v1/models/stations/trainings", {"json": {"data": {"csv": levels}, "spec": level_spec}}),
        ("big_json_body", "/v1/models/pumps/trainings", {"content": big_json, "headers": json_h}),
        ("wide_batch", "/v1/models/wide/predictions?interval_level=0.9", {"content": wide_csv, "headers": csv_h}),
    ]


def wrk(base: str, seconds: float, connections: int, script: Path) -> float:
    """p99 latency in milliseconds of single-row predictions, from wrk --latency."""
    exe = shutil.which("wrk")
    if exe is None:
        raise SystemExit("wrk is not installed (apt-get install wrk)")
    out = subprocess.run([exe, "-t1", f"-c{connections}", f"-d{max(1, int(seconds))}s", "--latency", "-s", str(script),
                          f"{base}/v1/models/pumps/predictions"], capture_output=True, text=True, check=True).stdout
    m = re.search(r"^\s*99%\s+([\d.]+)(us|ms|s)\s*$", out, re.M)
    if not m:
        raise RuntimeError(f"no p99 in wrk output:\n{out}")
    value, unit = float(m.group(1)), m.group(2)
    return value / 1000 if unit == "us" else value * 1000 if unit == "s" else value


def peak_rss(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) * 1024
    raise RuntimeError("no VmHWM")


def family(pid: int) -> list[int]:
    """``pid`` and its descendants (the intake and prediction processes it spawned)."""
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        for task in Path(f"/proc/{p}/task").glob("*/children"):
            todo += [int(c) for c in task.read_text().split()]
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quiet-s", type=float, default=15.0)
    ap.add_argument("--pressure-s", type=float, default=40.0)
    ap.add_argument("--connections", type=int, default=2)
    ap.add_argument("--hostile-workers", type=int, default=2)
    ap.add_argument("--only", default="", help="comma-separated hostile kinds to send (default: all), "
                    "to tell which one costs the latency")
    args = ap.parse_args(argv)

    with tempfile.TemporaryDirectory(prefix="tikhon-pressure-") as tmp:
        root = Path(tmp)
        settings = prepare(root)
        script = root / "post.lua"
        script.write_text('wrk.method = "POST"\nwrk.headers["Content-Type"] = "application/json"\n'
                          f"wrk.body = '{json.dumps(PROBE)}'\n")
        hostile = hostile_requests()
        if args.only:
            wanted = set(args.only.split(","))
            hostile = [h for h in hostile if h[0] in wanted]
            if not hostile:
                raise SystemExit(f"--only names no hostile kind: {args.only}")
        proc, base = start_server(settings, root / "server.log")
        try:
            assert httpx.post(f"{base}/v1/models/pumps/predictions", json=PROBE, timeout=60).status_code == 200
            quiet = wrk(base, args.quiet_s, args.connections, script)

            stop = threading.Event()
            tally: Counter = Counter()
            lock = threading.Lock()

            def sender(k: int) -> None:
                with httpx.Client(base_url=base, timeout=300) as client:
                    i = k * len(hostile) // max(1, args.hostile_workers)
                    while not stop.is_set():
                        label, path, kw = hostile[i % len(hostile)]
                        method = "GET" if label == "metrics" else "POST"
                        try:
                            status = client.request(method, path, **kw).status_code
                        except httpx.HTTPError as exc:
                            status = type(exc).__name__
                        with lock:
                            tally[(label, status)] += 1
                        i += 1

            threads = [threading.Thread(target=sender, args=(k,), daemon=True) for k in range(args.hostile_workers)]
            for t in threads:
                t.start()
            time.sleep(1.0)  # let the first hostile requests arrive
            pressure = wrk(base, args.pressure_s, args.connections, script)
            stop.set()
            for t in threads:
                t.join(timeout=300)
            peaks = {}
            for pid in family(proc.pid):
                try:
                    peaks[pid] = peak_rss(pid)
                except (OSError, RuntimeError):  # ended meanwhile
                    pass
            peak = peaks.get(proc.pid, 0)
            alive = proc.poll() is None and httpx.get(f"{base}/healthz", timeout=60).status_code == 200
        finally:
            proc.terminate()
            try:
                proc.wait(30)
            except subprocess.TimeoutExpired:
                proc.kill()
    for (label, status), count in sorted(tally.items(), key=lambda kv: (kv[0][0], str(kv[0][1]))):
        print(f"hostile {label:22s} status {status}: {count}")
    print("peak resident memory: " + ", ".join(f"{'API process' if pid == proc.pid else f'child {pid}'} "
                                               f"{v / 2**20:.0f} MB" for pid, v in peaks.items())
         )
    print(f"server alive after the run: {alive}; load average now {os.getloadavg()[0]:.1f} on {os.cpu_count()} CPUs")
    print(f"hostile_peak_rss_mb={peak / 2**20:.0f} predict_p99_ms_under_pressure={pressure:.2f} "
          f"predict_p99_ms_quiet={quiet:.2f} family_peak_rss_mb={sum(peaks.values()) / 2**20:.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
