"""What intervals and the elastic net cost, measured side by side in one run (in process, the engine only).

* Predictions: ``FittedModel.predict_detail`` on the same batch of rows without an interval and with a
  0.9 CV+ interval (a quantile over the out-of-fold residuals of every fold's fit, per row). The model is
  the demo scenario's spec with its RBF settings dropped (linear and polynomial degrees 2-6, 30
  strengths, 5 folds) trained on 3,000 rows; the batch is 10,000 rows of the same invented scenario.
* Training: ``tune`` of the same data and grid with an L2 penalty and with the elastic net (the same
  strengths, l1 ratios 0.2, 0.5 and 0.8). L2 gets every strength from one SVD per fold; the elastic net
  runs coordinate descent per (strength, ratio), so it costs more per grid point and has three times
  as many grid points.

Each figure is the median of ``--repeat`` runs. Last line:
``interval_cost_ratio=<with/without> elastic_net_cost_ratio=<elastic net/L2> elastic_net_per_point_ratio=<...>``.
Run: ``python benchmarks/bench_costs.py [--rows 3000] [--batch 10000] [--repeat 5]``.
"""

from __future__ import annotations

import argparse
import copy
import statistics
import time


def _median_time(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=3000)
    ap.add_argument("--batch", type=int, default=10000)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()

    from service.demo import DEMO_SPEC, pump_stations
    from service.engine import tune

    spec = copy.deepcopy(DEMO_SPEC)
    spec["bases"] = [b for b in spec["bases"] if b["kind"] != "rbf"]
    train = pump_stations(args.rows, seed=0)
    batch = {k: v for k, v in pump_stations(args.batch, seed=1).items() if k in ("station", "flow_lps", "head_m")}

    model = tune(train, spec).model
    plain = _median_time(lambda: model.predict_detail(batch), args.repeat)
    with_interval = _median_time(lambda: model.predict_detail(batch, interval_level=0.9), args.repeat)
    print(f"predict_detail, {args.batch} rows: without interval {plain * 1000:.1f} ms, "
          f"with a 0.9 interval {with_interval * 1000:.1f} ms")

    net = copy.deepcopy(spec)
    net["penalty"] = {**spec["penalty"], "kind": "elastic_net", "l1_ratios": [0.2, 0.5, 0.8]}
    l2_s = _median_time(lambda: tune(train, spec), max(1, args.repeat // 2))
    net_s = _median_time(lambda: tune(train, net), max(1, args.repeat // 2))
    print(f"tune, {args.rows} rows, 6 basis settings x 30 strengths x 5 folds: L2 {l2_s:.2f} s; "
          f"elastic net (x 3 l1 ratios) {net_s:.2f} s")
    print(f"interval_cost_ratio={with_interval / plain:.2f} elastic_net_cost_ratio={net_s / l2_s:.1f} "
          f"elastic_net_per_point_ratio={net_s / l2_s / 3:.1f}")


if __name__ == "__main__":
    main()
