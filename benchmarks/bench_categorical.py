"""Categorical columns in the summaries: as level sums (``Summary.of_grouped``) against the one-hot block
factored with the other columns, side by side in one run, on the same data and spec.

Data: the invented pump-station scenario (``service.demo.numeric_matrix``, seeded) with a categorical
``station`` column of ``--levels`` levels (each station adds its own offset to the energy), polynomial
degrees 1–3 × 30 strengths × 5 folds, L2, RMSE. Both runs must give the same CV table (the largest
relative difference of any split value is printed) and the same chosen point.

Timing: the best of ``--repeat`` runs of ``tune`` per route, wall and CPU-seconds of the whole process,
with the load average (the machine is shared).

Last line: ``rows_per_s_level_sums=<a> rows_per_s_one_hot=<b> speedup=<b/a wall> cpu_speedup=<c>
max_rel_diff=<d> same_chosen=<bool>``.
Run: ``python benchmarks/bench_categorical.py [--rows 200000] [--levels 100] [--repeat 3]``.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=200_000)
    ap.add_argument("--levels", type=int, default=100)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()

    from service.demo import numeric_matrix
    from service.engine import tune

    engine = sys.modules["service.engine.tune"]
    X, y, names = numeric_matrix(args.rows, seed=1)
    rng = np.random.default_rng(7)
    station = rng.integers(0, args.levels, args.rows)
    y = y + rng.normal(0.0, 0.5, args.levels)[station]  # each invented station's own offset
    data = {**{n: X[:, j] for j, n in enumerate(names)}, "station": np.array([f"S{v:04d}" for v in station], dtype=object),
            "energy_kwh": y}
    spec = {"target": "energy_kwh", "features": names, "categorical": ["station"],
            "bases": [{"kind": "polynomial", "degrees": [1, 2, 3]}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-4, "max": 1e4, "count": 30}},
            "cv": {"scheme": "kfold", "folds": 5, "seed": 0}}

    def timed(grouped: bool):
        engine.ONE_HOT_AS_LEVEL_SUMS = grouped
        walls, cpus, res = [], [], None
        try:
            for _ in range(args.repeat):
                t0, c0 = time.perf_counter(), time.process_time()
                res = tune(data, spec)
                walls.append(time.perf_counter() - t0)
                cpus.append(time.process_time() - c0)
        finally:
            engine.ONE_HOT_AS_LEVEL_SUMS = True
        return min(walls), min(cpus), res

    tune(data, spec)  # warm-up (imports, first allocations)
    g_wall, g_cpu, g = timed(True)
    o_wall, o_cpu, o = timed(False)
    diff = max(abs(a - b) / abs(b) for ra, rb in zip(g.cv_table, o.cv_table)
               for a, b in zip(ra["split_values"], rb["split_values"]))
    same = g.chosen["basis"] == o.chosen["basis"] and g.chosen["penalty"] == o.chosen["penalty"]
    print(f"rows={args.rows} levels={args.levels} grid=3 degrees x 30 strengths x 5 folds, design width "
          f"{args.levels + 34} at degree 3")
    print(f"level sums: wall_s={g_wall:.3f} cpu_s={g_cpu:.3f}   one-hot factored: wall_s={o_wall:.3f} cpu_s={o_cpu:.3f}"
          f"   (best of {args.repeat}); load average {' '.join(f'{v:.1f}' for v in os.getloadavg())}")
    print(f"rows_per_s_level_sums={args.rows / g_wall:.0f} rows_per_s_one_hot={args.rows / o_wall:.0f} "
          f"speedup={o_wall / g_wall:.2f} cpu_speedup={o_cpu / g_cpu:.2f} max_rel_diff={diff:.2e} same_chosen={same}")


if __name__ == "__main__":
    main()
