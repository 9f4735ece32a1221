"""Cost of building JSON answers through their response models (``service.api.answers.reply``) against
serializing the route's dict directly, for the largest answers: CV table pages (1,000 rows, the default
page, and 10,000, the largest) and a residual figure's numbers.

Prints the time per answer both ways, measured side by side in one run, and the ratio as its last line.
Run: python benchmarks/bench_answers.py [--repeat N]
"""

from __future__ import annotations

import argparse
import time

from service.api import answers as A
from service.api.render import dumps


def cv_page(rows: int) -> dict:
    table = [{"basis": {"kind": "polynomial", "degree": 1 + i % 6}, "strength": 1e-4 * 1.3 ** (i % 50),
              "l1_ratio": None, "mean": 1.0 + i * 1e-3, "std": 0.1, "se": 0.05, "df": 3.2,
              "split_values": [1.0, 2.0, 3.0, 4.0, 5.0]} for i in range(rows)]
    return {"name": "pump-energy", "version": 1, "selection": {"metric": "rmse", "rule": "best"}, "chosen": None,
            "summary": None, "view": "all", "total": rows, "offset": 0, "limit": rows, "table": table,
            "links": {"next": None}}


def residuals(rows: int) -> dict:
    return {"figure": "residuals", "name": "pump-energy", "version": 1, "x": "out-of-fold prediction",
            "y": "observed", "target": "energy_kwh", "rows": rows,
            "predicted": [float(i) for i in range(rows)], "observed": [float(i) + 0.5 for i in range(rows)]}


def best_of(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=7)
    args = ap.parse_args()
    ratios = []
    for label, model, body in (("cv page 1,000 rows", A.CvTable, cv_page(1_000)),
                               ("cv page 10,000 rows", A.CvTable, cv_page(10_000)),
                               ("residual figure 20,000 points", A.FigureData, residuals(20_000))):
        assert dumps(A.dump(model, body)) == dumps(body)  # the same bytes either way
        plain = best_of(lambda: dumps(body), args.repeat)
        typed = best_of(lambda: dumps(A.dump(model, body)), args.repeat)
        ratios.append(typed / plain)
        print(f"{label}: dict {plain * 1e3:.2f} ms, through {model.__name__} {typed * 1e3:.2f} ms")
    print(f"answer_model_cost_ratio_max={max(ratios):.1f}")


if __name__ == "__main__":
    main()
