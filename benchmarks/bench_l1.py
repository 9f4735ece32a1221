"""Elastic net against ridge on the same data and grid, side by side in one run, with its accuracy.

Data (invented, seeded): the pump-station scenario's readings (flow, head, water temperature, hour,
station) plus 16 derived sensor channels (noisy mixtures of the four, as redundant plant sensors are)
and two more categorical columns (pump model, shift): 20 numeric inputs and 3 categorical columns.
Grid: linear + polynomial degree 2 (230 basis terms + one-hot columns), 12 strengths, 5 folds; L2 once,
elastic net with l1 ratios 0.5 and 1.0 (the lasso). Both through ``service.engine.tune``.

Accuracy, on the training summary of every fold and of all rows, for every (strength, l1 ratio):
- max_kkt: the largest violation of the elastic net's KKT conditions, relative to the strength
  (``enet_gram``'s figure, recomputed here from the Gram matrix);
- max_rel_diff: ‖Z(β − β_sk)‖ / ‖Z β_sk‖ against ``sklearn.linear_model.ElasticNet(tol=1e-12,
  precompute=True)`` (its own coordinate descent on the Gram matrix of the rows, standardized as the
  engine does), at the points where scikit-learn reports convergence; fitted
  values are compared because they are unique even where collinear columns make the lasso's
  coefficients not unique (Tibshirani, "The lasso problem and uniqueness", EJS 7, 2013).

Last line: ``enet_over_l2=<time ratio> max_kkt=<violation / λ> max_rel_diff=<d>``.
Run: ``python benchmarks/bench_l1.py [--rows 5000] [--repeat 3] [--sk-folds 1]``.
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np


def scenario(n: int, seed: int = 3) -> dict[str, np.ndarray]:
    from service.demo import pump_stations

    d = pump_stations(n, seed, extra_features=True)
    rng = np.random.default_rng(seed)
    base = np.column_stack([d["flow_lps"], d["head_m"], d["water_temp_c"], d["hour"]])
    base = (base - base.mean(axis=0)) / base.std(axis=0)
    out = {k: d[k] for k in ("flow_lps", "head_m", "water_temp_c", "hour", "energy_kwh", "station")}
    for j in range(16):
        mix = rng.normal(size=4)
        out[f"sensor_{j:02d}"] = np.round(base @ mix + rng.normal(0, 0.5, n), 4)
    out["pump_model"] = np.array(["A", "B", "C", "D"], dtype=object)[rng.integers(0, 4, n)].astype(str)
    out["shift"] = np.array(["early", "late", "night"], dtype=object)[rng.integers(0, 3, n)].astype(str)
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=5_000)
    ap.add_argument("--repeat", type=int, default=3, help="best of N for each penalty")
    ap.add_argument("--sk-folds", type=int, default=1, help="folds whose fits are compared with scikit-learn")
    args = ap.parse_args()

    from sklearn.exceptions import ConvergenceWarning
    from sklearn.linear_model import ElasticNet

    from service.engine import tune
    from service.engine.solvers import centred_scaled, fit_enet
    from service.engine.summaries import Summary

    data = scenario(args.rows)
    numeric = [c for c in data if c not in ("energy_kwh", "station", "pump_model", "shift")]
    grid = {"min": 1e-3, "max": 10.0, "count": 12}
    common = {"target": "energy_kwh", "features": numeric, "categorical": ["station", "pump_model", "shift"],
              "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2]}],
              "cv": {"scheme": "kfold", "folds": 5, "seed": 0}}
    l2 = {**common, "penalty": {"kind": "l2", "strengths": grid}}
    enet = {**common, "penalty": {"kind": "elastic_net", "strengths": grid, "l1_ratios": [0.5, 1.0]}}

    def best_time(spec):
        best, res = np.inf, None
        for _ in range(args.repeat):
            t = time.perf_counter()
            res = tune(data, spec)
            best = min(best, time.perf_counter() - t)
        return best, res

    t_l2, _ = best_time(l2)
    t_enet, res = best_time(enet)
    print(f"rows={args.rows} basis terms={len(res.model.term_names)} candidates={len(res.cv_table)}")
    print(f"l2: {t_l2:.3f} s   elastic net: {t_enet:.3f} s   (best of {args.repeat})")

    # accuracy on the same training summaries the engine uses (degree 2, every fold and all rows)
    from service.engine.basis import BasisSetting, Categories, InputScaler, polynomial_powers
    from service.engine.folds import make_plan
    from service.engine.spec import parse_spec
    from service.engine.table import categorical_column

    spec = parse_spec(enet)
    X = np.column_stack([data[c] for c in numeric])
    Xs = InputScaler.fit(numeric, X).transform(X)
    cats = [categorical_column(data, c) for c in spec.categorical]
    block, _ = Categories.fit(spec.categorical, cats).encode(cats)
    Phi = np.hstack([BasisSetting("polynomial", degree=2, powers=polynomial_powers(X.shape[1], 2)).expand(Xs), block])
    y = data["energy_kwh"]
    plan = make_plan(spec.cv, y.size)
    strengths = spec.penalty.strength_grid()
    train_sets = [np.sort(np.concatenate([plan.atoms[i] for i in tr])) for tr, _ in plan.splits] + [np.arange(y.size)]
    max_kkt, max_diff, compared, skipped = 0.0, 0.0, 0, 0
    for s_i, rows in enumerate(train_sets):
        S = Summary.of(Phi[rows], y[rows])
        Zb, cy, mean, scale, _ = centred_scaled(S)
        G, c, n = Zb.T @ Zb, Zb.T @ cy, rows.size
        Zrows = np.where(scale > 0, (Phi[rows] - mean) / scale, 0.0)
        Zrows[:, np.all(Zb == 0, axis=0)] = 0.0
        yc = y[rows] - y[rows].mean()
        for ratio in (0.5, 1.0):
            f = fit_enet(S, strengths, ratio)
            for lam, b in zip(strengths, f.beta):
                gamma, nu = n * lam * ratio, n * lam * (1 - ratio)
                g = G @ b + nu * b - c
                viol = np.where(b != 0, np.abs(g + gamma * np.sign(b)), np.maximum(np.abs(g) - gamma, 0.0))
                max_kkt = max(max_kkt, float(viol.max()) / (n * lam))
            if s_i >= args.sk_folds and s_i != len(train_sets) - 1:
                continue
            for lam, b in zip(strengths, f.beta):
                with warnings.catch_warnings():
                    warnings.simplefilter("error", ConvergenceWarning)
                    try:
                        ref = ElasticNet(alpha=lam, l1_ratio=ratio, tol=1e-12, max_iter=100_000, precompute=True,
                                         fit_intercept=False).fit(Zrows, yc).coef_
                    except ConvergenceWarning:
                        skipped += 1
                        continue
                fitted_ref = Zrows @ ref
                diff = np.linalg.norm(Zrows @ b - fitted_ref) / max(np.linalg.norm(fitted_ref), 1e-300)
                max_diff = max(max_diff, float(diff))
                compared += 1
    print(f"KKT checked on {len(train_sets)} training sets × 2 ratios × {strengths.size} strengths; "
          f"scikit-learn compared at {compared} points ({skipped} where it did not converge were left out)")
    print("(machine shared with other jobs: times are indicative; the ratio is measured side by side)")
    print(f"enet_over_l2={t_enet / t_l2:.2f} max_kkt={max_kkt:.2e} max_rel_diff={max_diff:.2e}")


if __name__ == "__main__":
    main()
