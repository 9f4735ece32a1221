"""Continued training (service.engine.continued): a version's per-fold summaries plus only the new rows.

The exactness checks compare a continuation with training from scratch on every row with the parent's
fixed basis (``tune(..., basis=continued.fixed_basis(...))``); the coefficients are also checked against
scikit-learn's Ridge (an independent implementation) on the same design, with sample weights for old_weight.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.engine import tune
from service.engine.continued import CannotContinue, continue_tune, fixed_basis, merge_residuals, packed_bytes

TOL = 1e-9


def rows(n: int, seed: int, lo: float = 0.0, hi: float = 10.0, levels=("a", "b", "c")) -> dict[str, np.ndarray]:
    # synthetic test data (not a demo): a smooth curve in x1, a wave in x2, a level offset, Gaussian noise
    rng = np.random.default_rng(seed)
    x1 = rng.uniform(lo, hi, n)
    x2 = rng.uniform(-1, 1, n)
    c = rng.choice(list(levels), n).astype(object)
    y = 2 + 0.5 * x1 - 0.03 * x1 ** 2 + np.sin(3 * x2) + (c == "b") * 0.7 + rng.normal(0, 0.3, n)
    return {"x1": x1, "x2": x2, "c": c, "y": y}


def cat(*parts: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}


SPEC = {"target": "y", "categorical": ["c"],
        "bases": [{"kind": "polynomial", "degrees": [1, 2, 3]}, {"kind": "rbf", "centers": 15, "widths": [0.5, 1.0, 2.0]}],
        "penalty": {"strengths": {"min": 1e-4, "max": 1e3, "count": 15}},
        "cv": {"folds": 5, "assignment": "hash"}}


def assert_same(a, b, tol: float = TOL) -> None:
    """Two TuneResults agree: every CV figure, the choice, the refit and the fold models (relative to scale)."""
    ma = np.array([r["mean"] for r in a.cv_table])
    mb = np.array([r["mean"] for r in b.cv_table])
    assert np.max(np.abs(ma - mb) / np.abs(mb)) < tol
    fa = np.array([r["split_values"] for r in a.cv_table])
    fb = np.array([r["split_values"] for r in b.cv_table])
    assert np.max(np.abs(fa - fb) / np.abs(fb)) < tol
    assert a.chosen["index"] == b.chosen["index"]
    assert a.chosen["basis"] == b.chosen["basis"]
    scale = max(1.0, float(np.abs(b.model.beta).max()))
    assert np.max(np.abs(a.model.beta - b.model.beta)) < tol * scale
    assert abs(a.model.intercept - b.model.intercept) < tol * max(1.0, abs(b.model.intercept))
    assert np.max(np.abs(a.model.fold_weights - b.model.fold_weights)) < tol * max(1.0, np.abs(b.model.fold_weights).max())
    assert a.model.n_train == pytest.approx(b.model.n_train, rel=1e-12)


@pytest.fixture(scope="module")
def parent():
    A = rows(600, 1)
    result = tune(A, SPEC)
    body, arrays = result.to_artifact()
    return A, body, arrays


def test_continuing_equals_training_on_all_rows_with_the_fixed_basis(parent):
    A, body, arrays = parent
    B = rows(250, 2)
    cont = continue_tune(body, arrays, B)
    full = tune(cat(A, B), SPEC, basis=fixed_basis(body, arrays))
    assert_same(cont, full)
    assert cont.summary["rows"] == 850
    assert cont.lineage["new_rows"] == 250 and cont.lineage["old_weight"] == 1.0
    assert cont.lineage["new_data_fingerprint"] == cont.fingerprint["sha256"]
    # each new row lands in its full-training fold: the position after the parent's rows, hashed
    assert np.array_equal(cont.fold_of_row, full.fold_of_row[600:])


def test_a_chain_of_continuations_equals_one_continuation(parent):
    A, body, arrays = parent
    B1, B2 = rows(120, 3), rows(90, 4)
    one = continue_tune(body, arrays, B1)
    b1, a1 = one.to_artifact()
    two = continue_tune(b1, a1, B2)
    both = continue_tune(body, arrays, cat(B1, B2))
    assert_same(two, both)
    assert_same(two, tune(cat(A, B1, B2), SPEC, basis=fixed_basis(body, arrays)))


def test_old_weight_scales_earlier_rows_as_sklearn_ridge_with_sample_weights(parent):
    from sklearn.linear_model import Ridge

    A, body, arrays = parent
    B = rows(300, 5)
    w_old = 0.8
    cont = continue_tune(body, arrays, B, old_weight=w_old)
    assert cont.lineage["old_weight"] == w_old
    m = cont.model
    AB = cat(A, B)
    Phi, _, _ = m.design({k: v for k, v in AB.items() if k != "y"})
    w = np.concatenate([np.full(600, w_old), np.ones(300)])
    # the engine's fit: columns centred and scaled by their weighted mean and population std, intercept free,
    # ‖√w (y − b − Zβ)‖² + λ‖β‖² (service.engine.solvers docstring); scikit-learn's Ridge with sample_weight is
    # an independent implementation of that objective
    mu = w @ Phi / w.sum()
    sd = np.sqrt(w @ (Phi - mu) ** 2 / w.sum())
    sd = np.where(sd > 10 * np.finfo(float).eps * np.maximum(1, np.abs(mu)), sd, 1.0)
    Z = (Phi - mu) / sd
    ref = Ridge(alpha=m.penalty["strength"], solver="svd").fit(Z, AB["y"], sample_weight=w)
    assert np.max(np.abs(m.beta - ref.coef_)) < 1e-7 * max(1.0, np.abs(ref.coef_).max())
    assert m.n_train == pytest.approx(w.sum(), rel=1e-12)
    # and a chain with old_weight is the same as one continuation on the weighted union
    B2 = rows(100, 6)
    c1 = continue_tune(body, arrays, B, old_weight=w_old)
    b1, a1 = c1.to_artifact()
    c2 = continue_tune(b1, a1, B2, old_weight=w_old)
    assert c2.model.n_train == pytest.approx(w_old * (w_old * 600 + 300) + 100, rel=1e-12)


def test_weight_column_continuation_equals_full_training_with_scaled_old_weights():
    spec = {**SPEC, "weight": "w", "bases": [{"kind": "polynomial", "degrees": [1, 2]}]}
    A, B = rows(400, 7), rows(150, 8)
    rng = np.random.default_rng(9)
    A["w"], B["w"] = rng.uniform(0.5, 3, 400), rng.uniform(0.5, 3, 150)
    A["w"][:5] = 0.0  # zero-weight rows keep their fold and count for nothing
    parent = tune(A, spec)
    body, arrays = parent.to_artifact()
    w_old = 0.7
    cont = continue_tune(body, arrays, B, old_weight=w_old)
    AB = cat(A, B)
    AB["w"] = np.concatenate([w_old * A["w"], B["w"]])  # a full training rescales all weights to average 1
    assert_same(cont, tune(AB, spec, basis=fixed_basis(body, arrays)))


def test_summary_size_is_folds_times_the_upper_triangles(parent):
    _, body, arrays = parent
    meta = body["continuation"]
    # nested group: [1, one-hot (3), cubic terms of 2 inputs (9), y] = 14 columns; each RBF setting 1 + 15 + 3 + 1
    assert [g["columns"] for g in meta["groups"]] == [14, 20, 20, 20]
    assert meta["bytes"] == packed_bytes(14, 5) + 3 * packed_bytes(20, 5) == 8 * 5 * (14 * 15 + 3 * 20 * 21) // 2
    assert sum(v.nbytes for k, v in arrays.items() if k.startswith("continuation_r")) == meta["bytes"]


def test_summaries_above_the_limit_are_not_kept_and_the_version_says_so():
    from service.engine.tune import Budget

    result = tune(rows(200, 10), SPEC, budget=Budget(max_summary_bytes=1000))
    body, arrays = result.to_artifact()
    assert "continuation" not in body
    assert any("max_summary_bytes" in w for w in result.warnings)
    with pytest.raises(CannotContinue, match="keeps no per-fold summaries"):
        continue_tune(body, arrays, rows(10, 11))
    # room for the nested group and one RBF setting: the second RBF setting passes the bound, and the search
    # lets go of what it kept (it never holds more than the bound); the warning names the whole size
    limit = packed_bytes(14, 5) + packed_bytes(20, 5)
    result = tune(rows(200, 10), SPEC, budget=Budget(max_summary_bytes=limit))
    assert result.continuation is None
    whole = packed_bytes(14, 5) + 3 * packed_bytes(20, 5)
    assert any(f"({whole:,} bytes, above the limit max_summary_bytes={limit:,})" in w for w in result.warnings)
    assert tune(rows(200, 10), SPEC, budget=Budget(max_summary_bytes=limit + 2 * packed_bytes(20, 5))).continuation


@pytest.mark.parametrize("cv, reason", [
    ({"folds": 5}, "assignment 'auto'"),  # in memory, auto is a shuffle
    ({"folds": 5, "assignment": "shuffle"}, "assignment 'shuffle'"),
    ({"scheme": "repeated_kfold", "folds": 3, "repeats": 2, "assignment": "hash"}, "repeated_kfold"),
    ({"scheme": "time_ordered", "folds": 3, "order_by": "x1"}, "time_ordered"),
    ({"scheme": "loo"}, "loo"),
])
def test_schemes_that_cannot_continue_are_refused_with_the_reason(cv, reason):
    spec = {"target": "y", "categorical": ["c"], "bases": [{"kind": "linear"}], "cv": cv}
    body, arrays = tune(rows(80, 12), spec).to_artifact()
    assert "continuation" not in body
    with pytest.raises(CannotContinue, match=reason) as err:
        continue_tune(body, arrays, rows(10, 13))
    assert "train from scratch" in str(err.value)


def test_per_fold_basis_and_mae_are_refused():
    for extra, reason in (({"basis_fit": "per_fold"}, "per_fold"), ({"selection": {"metric": "mae"}}, "mae")):
        spec = {"target": "y", "bases": [{"kind": "linear"}], "cv": {"folds": 4, "assignment": "hash"}, **extra}
        body, arrays = tune(rows(80, 14), spec).to_artifact()
        with pytest.raises(CannotContinue, match=reason):
            continue_tune(body, arrays, rows(10, 15))


def test_an_old_version_without_summaries_is_refused(parent):
    _, body, arrays = parent
    old = {k: v for k, v in body.items() if k != "continuation"}
    with pytest.raises(CannotContinue, match="keeps no per-fold summaries"):
        continue_tune(old, arrays, rows(10, 16))


def test_a_new_column_set_is_refused(parent):
    _, body, arrays = parent
    B = rows(20, 17)
    B["x3"] = np.ones(20)  # one more numeric column becomes a default feature
    with pytest.raises(CannotContinue, match="feature columns"):
        continue_tune(body, arrays, B)
    del B["x3"], B["x2"]
    with pytest.raises(CannotContinue, match="feature columns"):
        continue_tune(body, arrays, B)


def test_old_weight_outside_its_range_is_refused(parent):
    from service.errors import InvalidData

    _, body, arrays = parent
    for w in (0.0, 1.5, -1):
        with pytest.raises(InvalidData, match="old_weight"):
            continue_tune(body, arrays, rows(10, 18), old_weight=w)


def test_unseen_levels_and_inputs_outside_the_ranges_are_accepted_with_warnings(parent):
    A, body, arrays = parent
    B = rows(60, 19, lo=5, hi=14, levels=("a", "d"))
    cont = continue_tune(body, arrays, B)
    text = " ".join(cont.warnings)
    assert "['d'] of categorical column 'c'" in text and "encode as zeros" in text
    assert "x1 reaches" in text and "outside the parent version's input ranges" in text
    assert cont.model.categories.levels == [["a", "b", "c"]]  # the basis is the parent's
    assert cont.model.ranges["x1"][1] == pytest.approx(float(B["x1"].max()))
    # still exact against a full training with the parent's basis (unseen levels are zero columns there too)
    assert_same(cont, tune(cat(A, B), SPEC, basis=fixed_basis(body, arrays)))


def test_residual_pooling_keeps_the_union_when_nothing_is_thinned():
    old = np.array([0.1, 0.5, 0.2, 0.9])
    old_fold = np.array([0, 0, 1, 1])
    new = np.array([0.3, 0.05])
    new_fold = np.array([1, 0])
    r, f, g = merge_residuals(old, old_fold, 1.0, new, new_fold)
    assert g == 1.0
    assert r.tolist() == [0.05, 0.1, 0.5, 0.2, 0.3, 0.9] and f.tolist() == [0, 0, 0, 1, 1, 1]
    # weighted: old residuals at half weight count as half as many
    r, f, g = merge_residuals(np.arange(1.0, 9.0), np.zeros(8, int), 0.5, np.array([100.0, 200.0]), np.zeros(2, int))
    assert r.size == 6 and r[-2:].tolist() == [100.0, 200.0]


def test_cv_plus_coverage_after_continuation():
    # CV+ (Barber, Candès, Ramdas & Tibshirani, Ann. Statist. 49(1), 2021): coverage about 1 − α in practice.
    # After a continuation the residuals pool the parent's (its own fold models) with the new rows' (the
    # new fold models), weighted by old_weight; on data from one distribution the coverage stays nominal.
    spec = {"target": "y", "categorical": ["c"], "bases": [{"kind": "polynomial", "degrees": [1, 2, 3]}],
            "cv": {"folds": 5, "assignment": "hash"}}
    body, arrays = tune(rows(1500, 20), spec).to_artifact()
    for w in (1.0, 0.5):
        cont = continue_tune(body, arrays, rows(500, 21), old_weight=w)
        test = rows(6000, 22)
        detail = cont.model.predict_detail({k: v for k, v in test.items() if k != "y"}, interval_level=0.9)
        covered = np.mean((test["y"] >= detail["lower"]) & (test["y"] <= detail["upper"]))
        # binomial standard error at 6,000 rows is 0.004; a ±0.025 band
        assert 0.875 <= covered <= 0.925, (w, covered)
    # the leverage threshold covers the parent's and the new rows'
    assert cont.model.max_leverage >= body["model"]["max_leverage"]


def test_a_streamed_version_continues_exactly(tmp_path):
    # scikit-learn's diabetes data (a dataset the PyPI package ships), streamed from Parquet files for the parent
    import pyarrow as pa
    import pyarrow.parquet as pq
    from sklearn.datasets import load_diabetes

    from service.engine.streaming import tune_partitions
    from service.sources import open_source

    X, y = load_diabetes(return_X_y=True)
    d = {f"x{j}": X[:, j] for j in range(4)}
    d["sex"] = np.where(X[:, 1] > 0, "f", "m").astype(object)
    d["y"] = y
    spec = {"target": "y", "categorical": ["sex"],
            "bases": [{"kind": "polynomial", "degrees": [1, 2]}, {"kind": "rbf", "widths": [1.0], "centers": 20}],
            "cv": {"folds": 5, "seed": 3, "assignment": "hash"}, "execution": {"batch_rows": 256}}
    A = {k: v[:300] for k, v in d.items()}
    B = {k: v[300:] for k, v in d.items()}
    folder = tmp_path / "parts"
    folder.mkdir()
    for i, (a, b) in enumerate(((0, 150), (150, 300))):
        pq.write_table(pa.table({k: v[a:b] for k, v in A.items()}), folder / f"part-{i}.parquet")
    schema, parts = open_source(str(folder), spec)
    body, arrays = tune_partitions(parts, schema, spec).to_artifact()
    assert body["continuation"]["positions"] == 300
    cont = continue_tune(body, arrays, B)
    assert_same(cont, tune(d, spec, basis=fixed_basis(body, arrays)))


def test_row_key_and_grouped_folds_follow_the_keys_not_the_order():
    # with cv.row_key the new rows' folds come from their keys, so a full training on the rows in another
    # order is the same training; with grouped, a new row of a known group joins that group's fold
    spec = {"target": "y", "categorical": ["c"], "bases": [{"kind": "polynomial", "degrees": [1, 2]}],
            "cv": {"folds": 5, "assignment": "hash", "row_key": "id"}}
    A, B = rows(200, 30), rows(60, 31)
    A["id"], B["id"] = np.arange(200) * 7.0, 5000 + np.arange(60.0)
    body, arrays = tune(A, spec).to_artifact()
    assert_same(continue_tune(body, arrays, B), tune(cat(B, A), spec, basis=fixed_basis(body, arrays)))
    spec = {**spec, "cv": {"scheme": "grouped", "group_by": "g", "folds": 3, "assignment": "hash"}}
    A["g"] = np.array([f"pump-{i % 7}" for i in range(200)], dtype=object)
    B["g"] = np.array([f"pump-{i % 9}" for i in range(60)], dtype=object)  # two groups are new
    body, arrays = tune(A, spec).to_artifact()
    assert_same(continue_tune(body, arrays, B), tune(cat(A, B), spec, basis=fixed_basis(body, arrays)))


def test_a_single_new_row_and_a_constant_new_target_continue():
    body, arrays = tune(rows(150, 32), SPEC).to_artifact()
    one = continue_tune(body, arrays, rows(1, 33))
    assert one.summary["rows"] == 151 and np.isfinite(one.chosen["mean"])
    B = rows(6, 34)
    B["y"][:] = 3.0  # constant among the new rows only: still rows of a varying target overall
    assert np.isfinite(continue_tune(body, arrays, B).chosen["mean"])


def test_new_rows_are_checked_before_queueing_as_the_continuation_would_check_them(parent):
    from service.engine.continued import check_new_rows
    from service.engine.tune import Budget
    from service.errors import BudgetExceeded, InvalidData

    _, body, arrays = parent
    assert check_new_rows(body, rows(30, 40))["basis_settings"] == 6
    many = rows(3000, 41)
    many["c"] = np.array([f"station-{i}" for i in range(3000)], dtype=object)  # hostile: a level per row
    with pytest.raises(BudgetExceeded, match="max_levels"):
        check_new_rows(body, many, Budget(max_levels=1000))
    bad = rows(30, 42)
    bad["y"][4] = np.inf
    with pytest.raises(InvalidData, match="rows \\[4\\]"):
        check_new_rows(body, bad)
    with pytest.raises(CannotContinue, match="keeps no per-fold summaries"):
        check_new_rows({k: v for k, v in body.items() if k != "continuation"}, rows(30, 43))


def test_the_drift_reference_counts_old_and_new_rows_in_the_parents_bins(parent):
    from service.engine import drift

    A, body, arrays = parent
    B = rows(200, 50, lo=3, hi=13, levels=("a", "d"))
    ref = continue_tune(body, arrays, B).drift
    AB = cat(A, B)
    for entry, parent_entry in zip(ref["numeric"], body["drift_reference"]["numeric"]):
        assert entry["edges"] == parent_entry["edges"]  # the parent's bins
        counts = drift.numeric_counts(entry["edges"], AB[entry["name"]])  # every row counted in them
        np.testing.assert_allclose(entry["training"], counts / counts.sum(), rtol=1e-12)
    (c,) = ref["categorical"]
    counts = drift.categorical_counts(c["levels"], AB["c"].tolist())
    np.testing.assert_allclose(c["training"], counts / counts.sum(), rtol=1e-12)
    assert c["training"][-1] > 0  # level "d" is in the levels-never-seen bin
    half = continue_tune(body, arrays, B, old_weight=0.5).drift["numeric"][0]["training"]
    counts_a = drift.numeric_counts(ref["numeric"][0]["edges"], A["x1"])
    counts_b = drift.numeric_counts(ref["numeric"][0]["edges"], B["x1"])
    np.testing.assert_allclose(half, (0.5 * counts_a + counts_b) / (0.5 * 600 + 200), rtol=1e-12)
