"""Behaviour of the tuning engine: the facts of the trade, the CV schemes, selection, and bad input."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.model_selection import GroupKFold, KFold, RepeatedKFold, TimeSeriesSplit

from service.engine import Budget, FittedModel, check_budget, load_model, tune
from service.errors import BudgetExceeded, Cancelled, InvalidData, InvalidSpec


def diabetes(n=None):
    X, y = load_diabetes(return_X_y=True)  # ships with scikit-learn (Efron et al., 2004)
    if n:
        X, y = X[:n], y[:n]
    return {**{f"x{j}": X[:, j] for j in range(X.shape[1])}, "y": y}


LIN = {"bases": [{"kind": "linear"}]}


# ---- facts of the trade -----------------------------------------------------------------------------
def test_duplicate_columns_share_their_weight_equally():
    # Common practice: ridge splits the weight of identical columns equally (strictly convex penalty).
    d = diabetes()
    d["x2_copy"] = d["x2"].copy()
    res = tune(d, {"target": "y", **LIN, "penalty": {"strengths": [0.5, 10.0]}, "cv": {"folds": 3}})
    names = res.model.features
    b = res.model.beta
    assert b[names.index("x2")] == pytest.approx(b[names.index("x2_copy")], rel=1e-10)
    assert abs(b[names.index("x2")]) > 1.0  # a real, shared weight, not two zeros


def test_huge_strength_predicts_the_mean_of_y():
    # Common practice: as λ → ∞ every penalized coefficient → 0 and only the (unpenalized) intercept remains.
    d = diabetes()
    res = tune(d, {"target": "y", "bases": [{"kind": "polynomial", "degrees": [2]}],
                   "penalty": {"strengths": [1e14]}, "cv": {"folds": 3}})
    pred = res.model.predict(d)
    np.testing.assert_allclose(pred, d["y"].mean(), rtol=1e-8)


def test_intercept_is_not_penalized():
    # Common practice: shifting y by a constant shifts predictions by the same constant at any λ.
    d = diabetes()
    spec = {"target": "y", **LIN, "penalty": {"strengths": [50.0]}, "cv": {"folds": 3}}
    a = tune(d, spec).model.predict(d)
    d2 = dict(d, y=d["y"] + 1000.0)
    b = tune(d2, spec).model.predict(d2)
    np.testing.assert_allclose(b - a, 1000.0, rtol=1e-10)


def test_ols_on_collinear_data_gives_the_minimum_norm_solution():
    d = diabetes()
    d["dup"] = 2.0 * d["x0"]
    res = tune(d, {"target": "y", **LIN, "penalty": {"strengths": [0.0]}, "cv": {"folds": 3}})
    # numpy.linalg.lstsq gives the minimum-norm least-squares solution (independent reference)
    Z = np.column_stack([d[f] for f in res.model.features])
    Zs = (Z - Z.mean(0)) / Z.std(0)  # the inputs standardized on all rows ...
    Zs = (Zs - Zs.mean(0)) / Zs.std(0)  # ... and the basis columns scaled again on the training rows
    coef, *_ = np.linalg.lstsq(Zs, d["y"] - d["y"].mean(), rcond=None)
    np.testing.assert_allclose(res.model.beta, coef, rtol=1e-8, atol=1e-8)
    assert np.isfinite(res.cv_table[0]["mean"])


# ---- schemes use scikit-learn's splitters exactly ----------------------------------------------------
def _fold_rmse(X, y, splits, lam):
    out = []
    for tr, te in splits:
        mu, sd = X[tr].mean(0), X[tr].std(0)
        m = Ridge(alpha=lam).fit((X[tr] - mu) / sd, y[tr])
        out.append(np.sqrt(np.mean((y[te] - m.predict((X[te] - mu) / sd)) ** 2)))
    return out


def test_folds_are_exactly_kfold_shuffled():
    d = diabetes()
    res = tune(d, {"target": "y", **LIN, "penalty": {"strengths": [1.0]}, "cv": {"folds": 4, "seed": 11}})
    for j, (_, te) in enumerate(KFold(4, shuffle=True, random_state=11).split(d["y"])):
        assert set(np.flatnonzero(res.fold_of_row == j)) == set(te)


@pytest.mark.parametrize("scheme", ["repeated_kfold", "grouped", "time_ordered"])
def test_other_schemes_match_scikit_learn_splitters(scheme):
    d = diabetes(200)
    rng = np.random.default_rng(0)
    d["site"] = rng.integers(0, 9, 200).astype(str)
    d["t"] = rng.permutation(200).astype(float)
    cv = {"scheme": scheme, "folds": 3, "repeats": 2, "seed": 5, "group_by": "site" if scheme == "grouped" else None,
          "order_by": "t" if scheme == "time_ordered" else None}
    feats = [f"x{j}" for j in range(10)]
    res = tune(d, {"target": "y", "features": feats, **LIN, "penalty": {"strengths": [3.0]}, "cv": cv})
    X = np.column_stack([d[f] for f in feats])
    X = (X - X.mean(0)) / X.std(0)
    y = d["y"]
    if scheme == "repeated_kfold":
        splits = list(RepeatedKFold(n_splits=3, n_repeats=2, random_state=5).split(X))
    elif scheme == "grouped":
        splits = list(GroupKFold(n_splits=3).split(X, groups=d["site"]))
    else:
        order = np.argsort(d["t"], kind="stable")
        splits = [(order[tr], order[te]) for tr, te in TimeSeriesSplit(n_splits=3).split(X)]
    np.testing.assert_allclose(res.cv_table[0]["split_values"], _fold_rmse(X, y, splits, 3.0), rtol=1e-9)


def test_per_fold_basis_fit_refits_scaling_inside_each_fold():
    d = diabetes(300)
    feats = ["x0", "x2", "x3"]
    res = tune(d, {"target": "y", "features": feats, "bases": [{"kind": "polynomial", "degrees": [2]}],
                   "basis_fit": "per_fold", "penalty": {"strengths": [0.3]}, "cv": {"folds": 3, "seed": 2}})
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import PolynomialFeatures, StandardScaler

    X = np.column_stack([d[f] for f in feats])
    want = []
    for tr, te in KFold(3, shuffle=True, random_state=2).split(X):
        m = make_pipeline(StandardScaler(), PolynomialFeatures(2, include_bias=False), StandardScaler(),
                          Ridge(alpha=0.3)).fit(X[tr], d["y"][tr])
        want.append(np.sqrt(np.mean((d["y"][te] - m.predict(X[te])) ** 2)))
    np.testing.assert_allclose(res.cv_table[0]["split_values"], want, rtol=1e-9)


def test_mae_and_r2_metrics_match_scikit_learn_scorers():
    from sklearn.metrics import mean_absolute_error, r2_score

    d = diabetes()
    feats = [f"x{j}" for j in range(10)]
    X = np.column_stack([d[f] for f in feats])
    X = (X - X.mean(0)) / X.std(0)
    for metric, scorer in (("mae", mean_absolute_error), ("r2", r2_score)):
        res = tune(d, {"target": "y", **LIN, "penalty": {"strengths": [2.0]}, "cv": {"folds": 4, "seed": 1},
                       "selection": {"metric": metric}})
        want = []
        for tr, te in KFold(4, shuffle=True, random_state=1).split(X):
            mu, sd = X[tr].mean(0), X[tr].std(0)
            m = Ridge(alpha=2.0).fit((X[tr] - mu) / sd, d["y"][tr])
            want.append(scorer(d["y"][te], m.predict((X[te] - mu) / sd)))
        np.testing.assert_allclose(res.cv_table[0]["split_values"], want, rtol=1e-9)


# ---- selection ----------------------------------------------------------------------------------------
# The one-standard-error rule (ESL §7.10, df across bases) is checked in test_edges.py.


def test_edge_of_grid_warning():
    d = diabetes()
    res = tune(d, {"target": "y", **LIN, "penalty": {"strengths": {"min": 1e3, "max": 1e6, "count": 5}}})
    assert any("smallest in the grid" in w for w in res.warnings)


# ---- predictions, intervals, leverage, parts ------------------------------------------------------------
def test_parts_round_trip_and_prediction_detail():
    d = diabetes()
    res = tune(d, {"target": "y", "bases": [{"kind": "polynomial", "degrees": [1, 2]}],
                   "penalty": {"strengths": [1.0, 10.0, 100.0]}})
    body, arrays = res.to_artifact()
    assert all(a.dtype != object for a in arrays.values())
    import json

    body = json.loads(json.dumps(body))  # JSON-serializable
    model = load_model(body, {k: np.array(v) for k, v in arrays.items()})
    assert isinstance(model, FittedModel)
    np.testing.assert_array_equal(model.predict(d), res.model.predict(d))
    q = {k: v[:3].copy() for k, v in d.items() if k != "y"}
    q["x0"][2] = 10.0  # far outside the training range
    det = model.predict_detail(q, interval_level=0.9)
    assert det["warnings"][0] == [] and any("above the training range" in w for w in det["warnings"][2])
    assert all(det["lower"] < det["value"]) and all(det["value"] < det["upper"])


def test_cv_plus_interval_follows_its_definition():
    # CV+ (Barber, Candès, Ramdas & Tibshirani, Ann. Statist. 2021, sec. 3.2), evaluated by brute force
    d = diabetes()
    res = tune(d, {"target": "y", **LIN, "penalty": {"strengths": [5.0]}, "cv": {"folds": 5, "seed": 3}})
    m = res.model
    feats = m.features
    q = {f: d[f][:4] for f in feats}
    det = m.predict_detail(q, interval_level=0.8)
    Phi = np.column_stack([(d[f][:4] - mu) / s for f, mu, s in zip(feats, m.scaler.mean, m.scaler.scale)])
    n = d["y"].size
    R = np.abs(res.oof_residuals)
    for i in range(4):
        mu_k = m.fold_intercepts + m.fold_weights @ Phi[i]
        lo = np.sort(mu_k[res.fold_of_row] - R)[int(np.floor(0.2 * (n + 1))) - 1]
        hi = np.sort(mu_k[res.fold_of_row] + R)[int(np.ceil(0.8 * (n + 1))) - 1]
        assert det["lower"][i] == pytest.approx(lo, rel=1e-12)
        assert det["upper"][i] == pytest.approx(hi, rel=1e-12)


def test_progress_and_cancel():
    d = diabetes()
    seen = []
    tune(d, {"target": "y", "bases": [{"kind": "polynomial", "degrees": [1, 2]}], "cv": {"folds": 3}},
         progress=lambda done, total: seen.append((done, total)))
    assert seen == [(3, 6), (6, 6)]
    with pytest.raises(Cancelled):
        tune(d, {"target": "y", **LIN}, should_stop=lambda: True)


# ---- bad input: each gets a clear error that names what is wrong ----------------------------------------
@pytest.mark.parametrize("spec_patch,fragment", [
    ({"bases": [{"kind": "rbf", "widths": [0.0]}]}, "widths must be positive"),
    ({"bases": [{"kind": "polynomial", "degrees": [0]}]}, "degrees must be >= 1"),
    ({"penalty": {"strengths": [-1.0]}}, "strengths must be >= 0"),
    ({"cv": {"folds": 1}}, "cv.folds"),
    ({"cv": {"folds": 999}}, "more folds than rows"),
    ({"features": ["nope"]}, "'nope'"),
    ({"target": "missing"}, "target column 'missing' is not in the data"),
    ({"bases": [{"kind": "cubic"}]}, "bases.0"),
    ({"penalty": {"kind": "l1", "strengths": [0.0]}}, "strength 0 is allowed only for the l2"),
    ({"cv": {"scheme": "grouped"}}, "group_by"),
    ({"surprise": 1}, "surprise"),
])
def test_bad_specs_are_refused_with_the_field_named(spec_patch, fragment):
    d = diabetes(100)
    spec = {"target": "y", "cv": {"folds": 3}} | spec_patch
    with pytest.raises((InvalidSpec, InvalidData)) as err:
        tune(d, spec)
    msg = str(err.value) + " " + str(err.value.errors)
    assert fragment in msg, msg


def test_bad_data_is_refused_with_column_and_rows():
    d = diabetes(50)
    d["x3"] = d["x3"].copy()
    d["x3"][[4, 9]] = np.nan
    with pytest.raises(InvalidData, match=r"'x3'.*rows \[4, 9\]"):
        tune(d, {"target": "y", "cv": {"folds": 3}})
    d = diabetes(50)
    d["y"] = np.full(50, 3.0)
    with pytest.raises(InvalidData, match="constant"):
        tune(d, {"target": "y", "cv": {"folds": 3}})
    d = diabetes(50)
    d["x1"] = np.array(["a"] * 50, dtype=object)
    with pytest.raises(InvalidData, match="'x1' must be numeric"):
        tune(d, {"target": "y", "features": ["x0", "x1"], "cv": {"folds": 3}})
    with pytest.raises(InvalidData, match="same number of rows"):
        tune({"a": np.arange(5.0), "y": np.arange(4.0)}, {"target": "y"})


def test_budget_refuses_huge_grids_before_work():
    spec = {"target": "y", "bases": [{"kind": "polynomial", "degrees": list(range(1, 11))}],
            "penalty": {"strengths": {"min": 1e-4, "max": 1e4, "count": 5000}}, "cv": {"folds": 10}}
    with pytest.raises(BudgetExceeded, match="fits"):
        check_budget(spec, 10_000, 4, Budget(max_grid_fits=100_000))
    with pytest.raises(BudgetExceeded, match="basis terms"):
        check_budget({"target": "y", "bases": [{"kind": "polynomial", "degrees": [12]}]}, 1000, 30)
