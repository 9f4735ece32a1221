"""A few rows take ``FittedModel._detail_small`` (Python floats for the element-wise steps; for a narrow model
the sums too, numpy's products otherwise): its answers are those of the vectorized path bit for bit (values,
leverages, CV+ bounds and every warning), and its design matrix is scikit-learn's polynomial features of the
standardized inputs. Values (and a narrow model's leverages) are summed in one fixed tree order, so a row gets
the same bits alone or in any batch."""

from __future__ import annotations

import math
import numpy as np
import pytest
from sklearn.datasets import load_diabetes
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

import service.engine.model as model_module
from service.engine import tune


def _data(n: int = 300):
    X, y = load_diabetes(return_X_y=True)  # ships with scikit-learn (Efron et al., 2004)
    X, y = X[:n], y[:n]
    zone = np.array(["north", "south", "east"], dtype=object)[(np.arange(n) * 7) % 3]
    return {"age": X[:, 0], "bmi": X[:, 2], "bp": X[:, 3], "zone": zone, "y": y}


BASES = {"polynomial": [{"kind": "polynomial", "degrees": [3]}],  # p = 19 + 3 levels: numpy's products
         "quadratic": [{"kind": "polynomial", "degrees": [2]}],  # p = 9 + 3: narrow, Python floats throughout
         "linear": [{"kind": "linear"}]}  # p = 3 + 3: narrow


@pytest.fixture(scope="module", params=list(BASES))
def model(request):
    res = tune(_data(), {"target": "y", "bases": BASES[request.param], "categorical": ["zone"],
                         "penalty": {"strengths": [0.01]}, "cv": {"folds": 5, "seed": 3}})
    assert res.model._narrow == (request.param != "polynomial")  # both routes are covered
    return res.model


def queries():
    """Rows inside the data, above and below a range, an unseen level, a number as a label, far away (high
    leverage), and so far away that the cubic terms overflow."""
    d = _data()
    inside = {k: v[:3] for k, v in d.items() if k != "y"}
    yield "inside", inside
    yield "one row", {k: v[5:6] for k, v in inside.items()}
    yield "no rows", {k: v[:0] for k, v in inside.items()}
    out = {k: v.copy() for k, v in inside.items()}
    out["age"] = np.array([0.5, -0.4, 0.01])
    out["zone"] = np.array(["west", "north", "south"], dtype=object)
    yield "outside", out
    far = {"age": np.array([1e3, 0.0]), "bmi": np.array([-2e3, 0.0]), "bp": np.array([0.0, 1e103]),
           "zone": np.array(["north", 7.0], dtype=object)}
    yield "far", far
    over = {"age": np.array([0.0, 1e200, -1e160]), "bmi": np.array([1e200, 0.0, 1e160]), "bp": np.array([0.0, 0.0, 3e-300]),
            "zone": np.array(["north", "east", "south"], dtype=object)}
    yield "overflow", over  # squares and products beyond the largest double: inf and nan alike on both paths


@pytest.mark.parametrize("interval_level", [None, 0.9, 0.5])
@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning", "ignore:invalid value encountered:RuntimeWarning")
def test_few_rows_answer_as_the_vectorized_path_bit_for_bit(model, interval_level, monkeypatch):
    for label, q in queries():
        small = model.predict_detail(q, interval_level=interval_level)
        with monkeypatch.context() as mp:
            mp.setattr(model_module, "SMALL_ROWS", -1)  # every call takes the vectorized path
            mp.setattr(model_module, "_DIRECT_VALUES", -1)  # and the windowed CV+ order statistic
            ref = model.predict_detail(q, interval_level=interval_level)
        for key in ("value", "leverage", "lower", "upper"):
            if ref[key] is None:
                assert small[key] is None, (label, key)
            elif label == "overflow" and key in ("lower", "upper"):
                # the two CV+ routes (direct ranking, bisection) give NaN bounds of either sign where the fold
                # predictions overflow; nothing reads a NaN's sign (an answer writes any NaN as null)
                a, b = small[key].copy(), ref[key].copy()
                assert np.array_equal(np.isnan(a), np.isnan(b)), (label, key, a, b)
                a[np.isnan(a)] = b[np.isnan(b)] = np.nan
                assert a.tobytes() == b.tobytes(), (label, key, small[key], ref[key])
            else:
                assert small[key].tobytes() == ref[key].tobytes(), (label, key, small[key], ref[key])
        assert small["warnings"] == ref["warnings"], label
    outside = model.predict_detail(dict(queries())["outside"])["warnings"]
    assert any("above the training range" in w for w in outside[0])
    assert any("zone='west' was not seen in training" in w for w in outside[0])
    far = model.predict_detail(dict(queries())["far"])["warnings"]
    assert any("leverage" in w for w in far[0]) and any("zone=7 (a number) was not seen" in w for w in far[1])


def test_few_rows_design_is_scikit_learns_polynomial_features(model):
    d = _data()
    X = np.column_stack([d["age"], d["bmi"], d["bp"]])
    q = {"age": X[:4, 0], "bmi": X[:4, 1], "bp": X[:4, 2], "zone": d["zone"][:4]}
    Phi, _, _ = model._design_small(q)
    # scikit-learn as an independent implementation: population-SD standardization, then (polynomial basis)
    # the monomials up to degree 3 in PolynomialFeatures' column order, then one-hot levels in sorted order
    Z = StandardScaler().fit(X).transform(X[:4])
    degree = model.basis.degree if model.basis.kind == "polynomial" else 1
    poly = PolynomialFeatures(degree, include_bias=False).fit_transform(Z)
    onehot = (d["zone"][:4, None] == np.array(["east", "north", "south"])[None, :]).astype(float)
    np.testing.assert_allclose(Phi, np.hstack([poly, onehot]), rtol=1e-12, atol=1e-12)


def test_a_row_gets_the_same_bits_alone_and_in_any_batch(model):
    d = _data()
    q = {k: v[:40] for k, v in d.items() if k != "y"}
    whole = model.predict_detail(q)
    plain = model.predict(q)
    assert plain.tobytes() == whole["value"].tobytes()  # predict and predict_detail: one computation
    for size, start in ((1, 7), (2, 0), (5, 13), (16, 24), (17, 3), (33, 7)):  # few-rows and vectorized paths
        part = model.predict_detail({k: v[start:start + size] for k, v in q.items()})
        assert part["value"].tobytes() == whole["value"][start:start + size].tobytes(), size
        if model._narrow:  # a wide model's leverage goes through a matrix product, whose rounding may vary
            assert part["leverage"].tobytes() == whole["leverage"][start:start + size].tobytes(), size
        else:
            np.testing.assert_allclose(part["leverage"], whole["leverage"][start:start + size], rtol=1e-13)
    # the same numbers as the matrix-product form they replace, to rounding (common practice: a sum's
    # order changes only its last bits)
    Phi, _, _ = model.design(q)
    np.testing.assert_allclose(whole["value"], model.intercept + Phi @ model.weights, rtol=1e-13)
    Zs = (Phi - model.column_mean) / model.column_scale
    FZ = Zs @ model.leverage_factor.T
    np.testing.assert_allclose(whole["leverage"], 1.0 / model.n_train + (FZ * FZ).sum(axis=1), rtol=1e-12)


def test_tree_sums_meet_the_pairwise_error_bound_and_python_gives_the_same_bits():
    rng = np.random.default_rng(11)
    for p in [1, 2, 3, 5, 8, 13, 31, 64, 100]:
        S = rng.normal(size=(50, p)) * 10.0 ** rng.integers(-8, 9, size=(50, p))
        got = model_module._tree_sums(S.T)
        w = rng.normal(size=p)
        bind = model_module._row_program(p, 0)(w.tolist(), 0.5, [0.0] * p, [1.0] * p, [], 0.25)
        ref_rows = model_module._tree_sums((S * w).T)
        for i in range(S.shape[0]):
            # math.fsum is the correctly rounded sum; pairwise summation's bound is ⌈log₂ p⌉·u·Σ|xᵢ| to first
            # order (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., 2002, section 4.2;
            # the section number from memory)
            exact = math.fsum(S[i].tolist())
            bound = max(1, math.ceil(math.log2(p))) * 2.0 ** -53 * float(np.abs(S[i]).sum()) * (1 + 1e-12)
            assert abs(float(got[i]) - exact) <= bound, (p, i)
            value, lev = bind(S[i].tolist())
            assert value == 0.5 + float(ref_rows[i]) and lev == 0.25, (p, i)
    # IEEE specials pass through both alike
    S = np.array([[np.inf, 1.0, -np.inf], [1e308, 1e308, -1e308], [-0.0, -0.0, -0.0]])
    bind = model_module._row_program(3, 0)([1.0] * 3, 0.0, [0.0] * 3, [1.0] * 3, [], 0.0)
    for i in range(3):
        with np.errstate(over="ignore", invalid="ignore"):
            a = float(0.0 + model_module._tree_sums(S[i:i + 1].T)[0])
        b = bind(S[i].tolist())[0]
        assert (math.isnan(a) and math.isnan(b)) or (a == b and math.copysign(1, a) == math.copysign(1, b)), i
