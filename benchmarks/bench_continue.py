"""Continued training against training from scratch, side by side in one run.

A base version is trained on ``--rows`` rows (default 1,000,000) of the invented pump-station scenario
(``service.demo``, the README's demo spec with hash fold assignment: linear, polynomial degrees 2–6 and
three RBF widths of 60 centres, one-hot stations, 30 strengths, 5 folds). Then ``--new`` rows of the next
month (default 10,000) are
- merged into the base version's stored per-fold summaries (``continued.continue_tune``: the new rows'
  summaries, the whole sweep, the refit, the artifact), timed as ``continue_s``;
- trained from scratch together with the base rows (``tune`` on all rows: its own scaling, centres and
  folds, the artifact), timed as ``full_s``.
With ``--exact`` (default on) the continuation is also compared with a from-scratch training on all rows
with the base version's fixed basis (``tune(..., basis=...)``), which it must equal: the largest relative
difference of the CV means, the coefficients and the intercept is printed (not timed).

Wall and CPU seconds are printed with the load average (the machine is shared). Last line:
``continue_s=<s> full_s=<s> ratio=<continue/full>``.
Run: ``python benchmarks/bench_continue.py [--rows 1000000] [--new 10000] [--no-exact]``.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np


def timed(fn):
    w0, c0 = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - w0, time.process_time() - c0


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--new", type=int, default=10_000)
    ap.add_argument("--exact", action=argparse.BooleanOptionalAction, default=True)
    args = ap.parse_args()

    from service.demo import DEMO_SPEC, pump_stations
    from service.engine import tune
    from service.engine.continued import continue_tune, fixed_basis

    spec = {**DEMO_SPEC, "cv": {**DEMO_SPEC["cv"], "assignment": "hash"}}
    base = pump_stations(args.rows, seed=0)
    new = pump_stations(args.new, seed=1, month=1)
    both = {k: np.concatenate([base[k], new[k]]) for k in base}
    print(f"load average at start: {' '.join(f'{x:.2f}' for x in os.getloadavg())}; cores: {os.cpu_count()}")

    parent, base_s, base_cpu = timed(lambda: tune(base, spec).to_artifact())
    body, arrays = parent
    meta = body["continuation"]
    print(f"base version: {args.rows:,} rows in {base_s:.1f} s ({base_cpu:.1f} CPU s); per-fold summaries kept: "
          f"{meta['bytes'] / 2**20:.2f} MiB in {len(meta['groups'])} groups of {[g['columns'] for g in meta['groups']]} "
          f"columns x {meta['folds']} folds")

    (cont_result, cont_art), cont_s, cont_cpu = timed(
        lambda: (lambda r: (r, r.to_artifact()))(continue_tune(body, arrays, new)))
    (_, _), full_s, full_cpu = timed(lambda: (lambda r: (r, r.to_artifact()))(tune(both, spec)))
    print(f"continue: {args.new:,} new rows in {cont_s:.2f} s ({cont_cpu:.2f} CPU s); "
          f"from scratch on {args.rows + args.new:,} rows: {full_s:.1f} s ({full_cpu:.1f} CPU s); "
          f"cpu_ratio={cont_cpu / full_cpu:.4f}")
    if args.exact:
        ref = tune(both, spec, basis=fixed_basis(body, arrays))
        mc = np.array([r["mean"] for r in cont_result.cv_table])
        mf = np.array([r["mean"] for r in ref.cv_table])
        cv_diff = float(np.max(np.abs(mc - mf) / np.abs(mf)))
        beta_diff = float(np.max(np.abs(cont_result.model.beta - ref.model.beta)) / max(1.0, np.abs(ref.model.beta).max()))
        b0_diff = abs(cont_result.model.intercept - ref.model.intercept) / max(1.0, abs(ref.model.intercept))
        same = cont_result.chosen["index"] == ref.chosen["index"]
        print(f"exactness vs from scratch with the fixed basis: cv_mean_max_rel_diff={cv_diff:.2e} "
              f"coef_max_rel_diff={beta_diff:.2e} intercept_rel_diff={b0_diff:.2e} same_choice={same}")
    print(f"load average at end: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    print(f"continue_s={cont_s:.3f} full_s={full_s:.3f} ratio={cont_s / full_s:.4f}")


if __name__ == "__main__":
    main()
