"""Out-of-core training at scale, against the least work a streamed pass can do.

Generates (once, seeded) a Parquet file of ``--rows`` rows × 4 numeric features of the invented
pump-station scenario, then, each in a fresh process so peak memory is its own:
- train: polynomial degrees 1–6 × 50 strengths × 5 folds, L2, streamed in batches (``execution.mode``
  streaming, hash folds), with the in-process executor or ``--dask local``;
- floor: the least work any method must do: one streamed read of the file, the widest basis of the
  nested family (degree 6; every lower degree is a leading block of it) expanded once per batch, and one
  Gram matrix ``AᵀA`` of ``A = [1, Φ, y]`` accumulated over all rows, done as fast as the engine can
  (column-major expansion in place, batches on every usable core with one BLAS thread each);
- the train child keeps the scanned-column cache as a worker does (``service.scancache``, in a temporary
  folder beside the file; ``--scan-cache-bytes 0`` decodes the file on every pass instead);
- reads: the CPU-seconds of one pass that only reads the rows: decoding the file, decoding it while writing
  the cache (the scan), mapping the cache back (every later pass);
- gemm: the machine's matrix-product rate (GFLOP/s, best of 3 products of 2,000 × 2,000 matrices), so
  ``flop_ratio`` = training wall time / (the Gram's 2·n·m² flops at that rate);
- conditioning (untimed): κ of the widest basis, standardized, on the first 200,000 rows, and the relative
  accuracy u·κ² that a summary made of one Gram of it would keep; and κ of the basis the engine's streamed
  summaries are made in (``engine.orthobasis``: the same span, whitened orthogonal polynomials), whose one
  Gram matrix per block is accurate.

On a shared machine the CPU-seconds (every thread of the process) are the steadier measure:
``floor_cpu_ratio`` = training CPU-seconds / the floor's.

Last line: ``rows=<n> wall_s=<x> cpu_s=<c> peak_rss_mb=<y> floor_ratio=<z> floor_cpu_ratio=<r> flop_ratio=<f>``.
Run: ``python benchmarks/bench_scale.py [--rows 10000000] [--batch-rows 65536] [--dask local] [--scan-cache-bytes 0]``.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

FEATURES = ["flow_lps", "head_m", "water_temp_c", "hour"]
DEGREES = [1, 2, 3, 4, 5, 6]


def generate(path: Path, rows: int) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    from service.demo import numeric_matrix

    chunk = 1_000_000
    tmp = path.with_suffix(".tmp")
    with pq.ParquetWriter(tmp, pa.schema([(c, pa.float64()) for c in FEATURES + ["energy_kwh"]])) as w:
        for i, lo in enumerate(range(0, rows, chunk)):
            X, y, _ = numeric_matrix(min(chunk, rows - lo), seed=1000 + i)
            w.write_table(pa.table({**{c: X[:, j] for j, c in enumerate(FEATURES)}, "energy_kwh": y}),
                          row_group_size=chunk)
    os.replace(tmp, path)


def child_train(path: str, batch_rows: int, dask: str | None, cache_bytes: int = 2 * 2**30) -> dict:
    import tempfile

    from service.engine.executors import make_executor
    from service.engine.streaming import tune_partitions
    from service.engine.tune import Budget
    from service.scancache import ScanCache
    from service.sources import open_source

    spec = {"target": "energy_kwh", "features": FEATURES, "bases": [{"kind": "polynomial", "degrees": DEGREES}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-4, "max": 1e4, "count": 50}},
            "cv": {"scheme": "kfold", "folds": 5, "seed": 0, "assignment": "hash"},
            "execution": {"mode": "streaming", "batch_rows": batch_rows}}
    ex = make_executor(dask)
    split = _time_passes() if dask is None else {}
    t0, c0 = time.perf_counter(), time.process_time()
    schema, parts = open_source(Path(path))
    # as the worker does: the scanned-column cache in a scratch folder beside the data (not on Dask)
    with tempfile.TemporaryDirectory(dir=Path(path).parent) as scratch, \
            ScanCache(Path(scratch), cache_bytes if dask is None else 0) as cache:
        # the default job-cost limit (TIKHON_MAX_JOB_COST, 2e11 flops) refuses 10 million rows of degree 6, as
        # a server would until its operator raised it; the benchmark raises it the same way
        res = tune_partitions(cache.wrap(parts), schema, spec, executor=ex, budget=Budget(max_job_cost=1e14))
        reads = dict(cache.reads)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    ex.close()
    return {"cache_reads": reads, "wall_s": wall, "cpu_s": cpu, "passes": {k: [round(v[0], 2), round(v[1], 2)] for k, v in split.items()},
            "chosen": res.chosen["basis"], "strength": res.chosen["penalty"]["strength"],
            "cv_rmse": res.chosen["mean"], "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}


def child_reads(path: str, batch_rows: int) -> dict:
    """CPU-seconds of one pass that only reads the rows, three ways: decoding the file (what every pass did
    without the cache), decoding it while writing the cache (the scan's share), and mapping the cache back
    (every later pass)."""
    import tempfile

    from service.scancache import ScanCache
    from service.sources import open_source

    columns = FEATURES + ["energy_kwh"]
    _, parts = open_source(Path(path))

    def one_pass(ps) -> float:
        c0 = time.process_time()
        for p in ps:
            for batch in p.read(columns, batch_rows):
                for c in columns:  # touch every value, as a pass does
                    batch[c].sum()
        return time.process_time() - c0

    one_pass(parts)  # warm: imports, the file in the page cache
    out = {"source_cpu_s": one_pass(parts)}
    with tempfile.TemporaryDirectory(dir=Path(path).parent) as scratch, ScanCache(Path(scratch), 2**40) as cache:
        wrapped = cache.wrap(parts)
        out["write_cpu_s"] = one_pass(wrapped)
        out["mapped_cpu_s"] = one_pass(wrapped)
        out["cache_mb"] = cache.used / 2**20
    return out


def _time_passes() -> dict[str, list[float]]:
    """[wall, CPU] seconds spent in each pass of the streamed run (in-process executor only; CPU of the
    whole process, every thread): the engine's pass functions are wrapped by name, so the engine itself
    carries no timing code."""
    from service.engine import streaming

    spent: dict[str, list[float]] = {}
    for label, name in [("scan", "_scan_partition"), ("summaries", "_summarize"), ("score", "_score"),
                        ("final", "_final_pass")]:
        fn = getattr(streaming, name)

        def timed(*a, _fn=fn, _label=label, **k):
            t0, c0 = time.perf_counter(), time.process_time()
            try:
                return _fn(*a, **k)
            finally:
                was = spent.get(_label, [0.0, 0.0])
                spent[_label] = [was[0] + time.perf_counter() - t0, was[1] + time.process_time() - c0]

        setattr(streaming, name, timed)
    return spent


def child_floor(path: str, batch_rows: int) -> dict:
    import pyarrow.parquet as pq

    from contextlib import nullcontext

    from service.engine.basis import BasisSetting, polynomial_powers
    from service.engine.parallel import ordered_map, single_blas, usable_cores
    from service.engine.summaries import CHUNK_ROWS

    f = pq.ParquetFile(path)
    # the inputs' means and scales need a pass of their own in any method; the floor leaves it out and
    # uses fixed scales (it counts one read, one expansion of the widest basis and one Gram)
    top = BasisSetting("polynomial", degree=max(DEGREES), powers=polynomial_powers(4, max(DEGREES)))
    m = top.powers.shape[0] + 2
    threads = usable_cores()

    def gram(batch) -> np.ndarray:  # [1, Φ, y] built column-major in place, one Gram (BLAS-3)
        X = (np.column_stack([batch.column(i).to_numpy() for i in range(4)]) - 50.0) / 25.0
        y = batch.column(4).to_numpy()
        G = np.zeros((m, m))
        # CHUNK_ROWS rows at a time, as the engine's passes do: a design of a whole 65,536-row batch is a fresh
        # memory map on every batch, whose page faults cost more than the arithmetic
        for lo in range(0, X.shape[0], CHUNK_ROWS):
            A = np.empty((min(CHUNK_ROWS, X.shape[0] - lo), m), order="F")
            A[:, 0] = 1.0
            top.expand_into(X[lo:lo + CHUNK_ROWS], A[:, 1:-1])
            A[:, -1] = y[lo:lo + CHUNK_ROWS]
            G += A.T @ A
        return G

    G = np.zeros((m, m))
    t0, c0 = time.perf_counter(), time.process_time()
    # the same use of the cores as the engine: batches on every usable core, BLAS one thread each
    with single_blas() if threads > 1 else nullcontext():
        for part in ordered_map(gram, f.iter_batches(batch_size=batch_rows, columns=FEATURES + ["energy_kwh"]),
                                threads):
            G += part
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    rows = f.metadata.num_rows
    out = {"wall_s": wall, "cpu_s": cpu, "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
           "gram_flops": 2.0 * rows * m * m, "width": m}
    return out | conditioning(f, top)


def conditioning(f, top, rows: int = 200_000) -> dict:
    """Untimed: κ(Z), the 2-norm condition number of the widest basis with its columns centred and scaled to
    unit variance (what the penalty sees), on the file's first ``rows`` rows, from the singular values of a
    Householder R factor (accurate whatever κ is). A summary made of one Gram matrix AᵀA loses about u·κ²
    of relative accuracy in Z's weakest direction (common practice: the normal equations square the condition
    number; Golub & Van Loan, *Matrix Computations*, §5.3, the section number from memory), which is what the
    least-work floor would cost in accuracy if a method stopped there."""
    from service.engine.summaries import householder_r

    batch = next(f.iter_batches(batch_size=rows, columns=FEATURES))
    X = np.column_stack([batch.column(i).to_numpy() for i in range(4)])
    Phi = np.empty((X.shape[0], top.powers.shape[0]), order="F")
    top.expand_into((X - X.mean(axis=0)) / X.std(axis=0), Phi)
    Z = (Phi - Phi.mean(axis=0)) / Phi.std(axis=0)
    s = np.linalg.svd(householder_r(Z), compute_uv=False)
    kappa = float(s[0] / s[-1])
    # the basis the engine's streamed summaries are made in (``engine.orthobasis``, built from a sample of
    # 50,000 rows as the scan's), on the same rows: why one Gram matrix of it is accurate
    from service.engine import orthobasis

    Xs = (X - X.mean(axis=0)) / X.std(axis=0)
    basis = orthobasis.build(top.powers, Xs[:50_000])
    P = basis.design(Xs, batch_y(f, rows))[:, :-1]
    s = np.linalg.svd(householder_r(P / np.linalg.norm(P, axis=0)), compute_uv=False)
    return {"kappa": kappa, "gram_only_loss": float(np.finfo(float).eps / 2 * kappa ** 2), "kappa_rows": X.shape[0],
            "kappa_ortho": float(s[0] / s[-1])}


def batch_y(f, rows: int) -> np.ndarray:
    return next(f.iter_batches(batch_size=rows, columns=["energy_kwh"])).column(0).to_numpy()


def gemm_rate(size: int = 2000, repeat: int = 3) -> float:
    """The machine's matrix-product rate in flop/s (best of ``repeat`` products of size × size)."""
    rng = np.random.default_rng(0)
    a, b = rng.standard_normal((size, size)), rng.standard_normal((size, size))
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        a @ b
        best = min(best, time.perf_counter() - t0)
    return 2.0 * size ** 3 / best


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--batch-rows", type=int, default=65_536)
    ap.add_argument("--dir", default="/tmp/tikhon-bench-scale")
    ap.add_argument("--dask", default=None, help='"local" for a LocalCluster, or a scheduler address')
    ap.add_argument("--scan-cache-bytes", type=int, default=2 * 2**30,
                    help="the scanned-column cache's limit (TIKHON_SCAN_CACHE_BYTES); 0: decode the file every pass")
    ap.add_argument("--child", choices=["train", "floor", "gemm", "reads"])
    args = ap.parse_args()
    path = Path(args.dir) / f"pumps-{args.rows}.parquet"
    if args.child == "train":
        print(json.dumps(child_train(str(path), args.batch_rows, args.dask, args.scan_cache_bytes)))
        return
    if args.child == "floor":
        print(json.dumps(child_floor(str(path), args.batch_rows)))
        return
    if args.child == "reads":
        print(json.dumps(child_reads(str(path), args.batch_rows)))
        return
    if args.child == "gemm":
        print(json.dumps({"flops_per_s": gemm_rate()}))
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    if not path.exists():
        t0 = time.perf_counter()
        generate(path, args.rows)
        print(f"generated {path} ({path.stat().st_size / 2**20:.0f} MiB) in {time.perf_counter() - t0:.1f}s")

    def run(kind: str) -> dict:
        cmd = [sys.executable, __file__, "--child", kind, "--rows", str(args.rows), "--batch-rows",
               str(args.batch_rows), "--dir", args.dir, "--scan-cache-bytes", str(args.scan_cache_bytes)] + (
            ["--dask", args.dask] if args.dask and kind == "train" else [])
        out = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout.strip().splitlines()[-1]
        return json.loads(out)

    reads = run("reads")
    gemm = run("gemm")["flops_per_s"]
    floor = run("floor")
    train = run("train")
    gram_s = floor["gram_flops"] / gemm
    print(f"gemm: {gemm / 1e9:.1f} GFLOP/s; the Gram of [1, Φ, y] ({floor['width']} columns) is "
          f"{floor['gram_flops']:.3g} flops = {gram_s:.2f}s at that rate")
    print(f"floor: one streamed read, degree {max(DEGREES)} expanded once, one Gram: {floor['wall_s']:.1f}s "
          f"({floor['cpu_s']:.1f} CPU-s), peak RSS {floor['peak_rss_mb']:.0f} MB")
    print(f"conditioning of the widest basis, standardized (first {floor['kappa_rows']} rows): κ = {floor['kappa']:.3g}; "
          f"one Gram of it would keep only u·κ² = {floor['gram_only_loss']:.1g} relative accuracy in its weakest direction, "
          f"against the 1e-9 parity the engine keeps; the engine's summaries are one Gram of a whitened orthogonal-"
          f"polynomial basis with the same span instead, κ = {floor['kappa_ortho']:.3g} (column-scaled)")
    print(f"train: {train['wall_s']:.1f}s ({train['cpu_s']:.1f} CPU-s), chosen {train['chosen']} strength {train['strength']:.4g} "
          f"CV RMSE {train['cv_rmse']:.4f}, executor {'dask ' + args.dask if args.dask else 'in-process'}")
    if train["passes"]:
        print("train passes (wall s / CPU s): " + " ".join(f"{k}={w}/{c}" for k, (w, c) in train["passes"].items()))
    print("partition reads: " + " ".join(f"{k}={v}" for k, v in train["cache_reads"].items())
          + " (written: the scan, cached; mapped: from the cache; source: decoded again)")
    print(f"one reading pass, CPU-s: decoding the file {reads['source_cpu_s']:.2f}, decoding and writing the cache "
          f"{reads['write_cpu_s']:.2f}, mapping the cache back {reads['mapped_cpu_s']:.2f} ({reads['cache_mb']:.0f} MiB)")
    print(f"load average {' '.join(f'{v:.1f}' for v in os.getloadavg())}")
    print(f"rows={args.rows} wall_s={train['wall_s']:.1f} cpu_s={train['cpu_s']:.1f} peak_rss_mb={train['peak_rss_mb']:.0f} "
          f"floor_ratio={train['wall_s'] / floor['wall_s']:.2f} floor_cpu_ratio={train['cpu_s'] / floor['cpu_s']:.2f} "
          f"flop_ratio={train['wall_s'] / gram_s:.2f}")


if __name__ == "__main__":
    main()
