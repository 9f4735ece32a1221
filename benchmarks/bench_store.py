"""Loading a stored version cold (from disk) and warm (from the in-process cache), 1,000-term model.

The model: the engine tunes an RBF basis with 1,000 centers (one width, L2) on 1,500 rows of the
invented pump-station scenario (seeded), so the stored version holds a 1,000-term coefficient vector,
its 1,000 x 1,000 leverage factor, the centers and the regularization path.

* cold: a new ``Store`` (empty model cache) loads the version: catalog lookup, read and SHA-256 of
  manifest.json and arrays.npz, ``numpy.load(allow_pickle=False)``, checks, and the engine's
  ``load_model``. The files sit in the OS page cache after the first run (this does not drop caches,
  the machine is shared), so "cold" means cold for Tikhon, not for the disk.
* warm: ``Store.load`` of the same version again (catalog row cached for its TTL, model from the LRU).

Side by side in the same run: the time to publish the version, and a single-row prediction, so the
load figures can be read against them. Both catalogs are SQLite in a temporary folder.

Last line: ``cold_load_ms=<median> warm_load_us=<median>``.
Run: ``python benchmarks/bench_store.py [--centers 1000] [--repeat 15]``.
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--centers", type=int, default=1000)
    ap.add_argument("--rows", type=int, default=1500)
    ap.add_argument("--repeat", type=int, default=15)
    args = ap.parse_args()

    from service.demo import pump_stations
    from service.engine import tune
    from service.settings import Settings
    from service.store import Store

    data = pump_stations(args.rows, seed=7)
    target = "energy_kwh"
    spec = {"target": target, "bases": [{"kind": "rbf", "widths": [1.0], "centers": args.centers}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e2, "count": 4}},
            "cv": {"folds": 3, "seed": 0}}
    t = time.perf_counter()
    result = tune(data, spec)
    tune_s = time.perf_counter() - t
    body, arrays = result.to_artifact()
    terms = arrays["beta"].shape[0]  # the fitted coefficients, one per basis term
    array_bytes = sum(a.nbytes for a in arrays.values())

    with tempfile.TemporaryDirectory() as tmp:
        settings = Settings(store=Path(tmp) / "store")
        store = Store(settings)
        publish_ms = []
        for _ in range(3):
            t = time.perf_counter()
            row = store.publish("bench", body, arrays)
            publish_ms.append((time.perf_counter() - t) * 1e3)
        version = row["version"]
        store.close()

        cold_ms = []
        for _ in range(args.repeat):
            s = Store(settings)
            t = time.perf_counter()
            loaded = s.load("bench", version)
            cold_ms.append((time.perf_counter() - t) * 1e3)
            s.close()

        s = Store(settings)
        s.load("bench", version)
        warm_us = []
        for _ in range(args.repeat):
            n = 2000
            t = time.perf_counter()
            for _ in range(n):
                s.load("bench", version)
            warm_us.append((time.perf_counter() - t) / n * 1e6)
        one_row = {k: v[:1] for k, v in data.items() if k != target}
        loaded = s.load("bench", version)
        loaded.model.predict(one_row)
        t = time.perf_counter()
        for _ in range(200):
            loaded.model.predict(one_row)
        predict_us = (time.perf_counter() - t) / 200 * 1e6
        stats = s.cache_stats()
        s.close()

    cold = statistics.median(cold_ms)
    warm = statistics.median(warm_us)
    print(f"model: rbf, {args.centers} centers, {terms} terms, {len(arrays)} arrays, {array_bytes / 2**20:.1f} MiB; "
          f"tuned in {tune_s:.1f} s on {args.rows} rows")
    print(f"publish_ms median={statistics.median(publish_ms):.1f} (write + fsync + rename + catalog commit)")
    print(f"cold_load_ms median={cold:.2f} min={min(cold_ms):.2f} max={max(cold_ms):.2f} (n={args.repeat})")
    print(f"warm_load_us median={warm:.2f} min={min(warm_us):.2f} max={max(warm_us):.2f}")
    print(f"single_row_predict_us={predict_us:.1f}  cold/warm={cold * 1e3 / warm:.0f}x  cache={stats}")
    print(f"cold_load_ms={cold:.2f} warm_load_us={warm:.2f}")


if __name__ == "__main__":
    main()
