"""In-memory training of a nested polynomial group from one Gram matrix per atom (``tune._gram_summaries``,
the well-conditioned basis of ``service.engine.orthobasis``), and the refit's fold fits taken from the scoring.

The CV figures and the fold models are checked against scikit-learn (an independent implementation): the
pipeline PolynomialFeatures → StandardScaler → Ridge fitted on each fold's training rows of the inputs
standardized on all rows, as ``benchmarks/bench_tuning.py`` compares with GridSearchCV. The cases the Gram
matrices must refuse (a target the basis fits exactly) are checked the same way, and weighted rows against
the exact way of the same engine (itself checked against scikit-learn's weighted Ridge in test_weights.py).
"""

from __future__ import annotations

import sys

import numpy as np
import pytest
from sklearn.linear_model import Ridge
from sklearn.model_selection import KFold
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

from service.engine import tune
from service.engine.continued import continue_tune, fixed_basis

import service.engine.tune  # noqa: F401  (the module, not the function the package exports)

T = sys.modules["service.engine.tune"]
N = 12_000  # above tune.GRAM_MIN_ROWS
STRENGTHS = [1e-3, 0.1, 10.0]


def rows(n: int, seed: int, exact: bool = False) -> dict[str, np.ndarray]:
    # synthetic test data (not a demo): three inputs, two of them correlated, a smooth response
    rng = np.random.default_rng(seed)
    x1 = rng.normal(0.0, 1.0, n)
    x2 = 0.8 * x1 + 0.6 * rng.normal(0.0, 1.0, n)
    x3 = rng.uniform(-2.0, 2.0, n)
    y = 1.5 + np.sin(x1) + 0.3 * x2 * x3 - 0.2 * x3 ** 3
    if exact:  # a cubic the basis holds exactly: [1, Ψ, y] is singular, the Gram matrices must be refused
        y = 1.5 + x1 - 0.5 * x2 * x3 + 0.25 * x3 ** 3
    else:
        y = y + rng.normal(0.0, 0.2, n)
    return {"x1": x1, "x2": x2, "x3": x3, "y": y}


SPEC = {"target": "y", "bases": [{"kind": "polynomial", "degrees": [1, 2, 3, 4]}],
        "penalty": {"strengths": STRENGTHS}, "cv": {"folds": 5, "seed": 3}, "selection": {"rule": "best"}}


@pytest.fixture
def gram_calls(monkeypatch):
    """What ``_gram_summaries`` returned in each training: True (Gram matrices), False (the exact way)."""
    seen: list[bool] = []
    real = T._SharedSearch._gram_summaries

    def spy(self):
        out = real(self)
        seen.append(out is not None)
        return out

    monkeypatch.setattr(T._SharedSearch, "_gram_summaries", spy)
    return seen


def sklearn_reference(d: dict[str, np.ndarray], degree: int, lam: float, seed: int = 3):
    """Per fold of KFold(5, shuffle, seed): the RMSE on the held-out rows and the fold model's predictions on
    every row, by scikit-learn's pipeline on the inputs standardized on all rows (population std)."""
    X = np.column_stack([d["x1"], d["x2"], d["x3"]])
    Xs = (X - X.mean(0)) / X.std(0)
    y = d["y"]
    rmse, preds = [], []
    for tr, te in KFold(5, shuffle=True, random_state=seed).split(Xs):
        pipe = make_pipeline(PolynomialFeatures(degree, include_bias=False), StandardScaler(), Ridge(alpha=lam))
        pipe.fit(Xs[tr], y[tr])
        rmse.append(np.sqrt(np.mean((y[te] - pipe.predict(Xs[te])) ** 2)))
        preds.append(pipe.predict(Xs))
    return np.array(rmse), np.array(preds)


def fold_predictions(res, d: dict[str, np.ndarray]) -> np.ndarray:
    Phi = res.model.design(d)[0]
    return res.model.fold_intercepts[:, None] + res.model.fold_weights @ Phi.T


def test_gram_summaries_match_scikit_learn_fold_by_fold(gram_calls):
    d = rows(N, 1)
    res = tune(d, SPEC)
    assert gram_calls == [True]
    by_key = {(r["basis"]["degree"], r["strength"]): r for r in res.cv_table}
    assert len(by_key) == 4 * len(STRENGTHS)
    for degree in (2, 4):  # scikit-learn reference: PolynomialFeatures → StandardScaler → Ridge per fold
        for lam in STRENGTHS:
            want, _ = sklearn_reference(d, degree, lam)
            np.testing.assert_allclose(by_key[(degree, lam)]["split_values"], want, rtol=1e-9)
    # the refit's fold models (taken from the scoring's fits): each fold's scikit-learn model, every row
    degree, lam = res.chosen["basis"]["degree"], res.chosen["penalty"]["strength"]
    _, want = sklearn_reference(d, degree, lam)
    got = fold_predictions(res, d)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-9 * np.abs(want).max())
    # the largest training leverage (made chunk by chunk, the design never whole): the diagonal of the ridge
    # hat matrix 11ᵀ/n + Z (ZᵀZ + λI)⁻¹ Zᵀ of the standardized design, the intercept unpenalized (from the
    # ridge solution, Hastie, Tibshirani & Friedman, ESL 2nd ed. §3.4.1, eq. 3.44; the number from memory),
    # computed here directly
    Phi = res.model.design(d)[0]
    Z = (Phi - Phi.mean(0)) / Phi.std(0)
    h = 1.0 / N + np.einsum("ij,ij->i", Z @ np.linalg.inv(Z.T @ Z + lam * np.eye(Z.shape[1])), Z)
    assert res.model.max_leverage == pytest.approx(h.max(), rel=1e-9)


def test_an_exactly_fitted_target_takes_the_exact_way_with_the_same_figures(gram_calls):
    d = rows(N, 2, exact=True)
    res = tune(d, {**SPEC, "bases": [{"kind": "polynomial", "degrees": [3]}]})
    assert gram_calls == [False]  # a fold's [1, Ψ, y] is singular: OrthoBasis.r_factor refuses it
    # the exact way, checked against scikit-learn (relative to the target's scale: the errors are tiny)
    for lam in (0.1, 10.0):
        want, _ = sklearn_reference(d, 3, lam)
        got = next(r["split_values"] for r in res.cv_table if r["strength"] == lam)
        np.testing.assert_allclose(got, want, rtol=1e-7)


def test_weighted_rows_by_gram_matrices_equal_the_exact_way(gram_calls, monkeypatch):
    d = rows(N, 4)
    d["w"] = np.random.default_rng(5).uniform(0.2, 3.0, N)
    d["w"][:40] = 0.0  # zero-weight rows keep their fold and count for nothing
    spec = {**SPEC, "weight": "w"}
    by_gram = tune(d, spec)
    monkeypatch.setattr(T, "GRAM_MIN_ROWS", 10 * N)
    exact = tune(d, spec)
    assert gram_calls == [True, False]
    a = np.array([r["split_values"] for r in by_gram.cv_table])
    b = np.array([r["split_values"] for r in exact.cv_table])
    np.testing.assert_allclose(a, b, rtol=1e-9)
    assert by_gram.chosen["index"] == exact.chosen["index"]
    np.testing.assert_allclose(by_gram.model.beta, exact.model.beta, rtol=0, atol=1e-9 * np.abs(exact.model.beta).max())
    np.testing.assert_allclose(fold_predictions(by_gram, d), fold_predictions(exact, d), rtol=1e-9)
    assert by_gram.model.max_leverage == pytest.approx(exact.model.max_leverage, rel=1e-9)


def test_a_continuation_of_a_gram_trained_version_equals_training_on_every_row(gram_calls):
    A, B = rows(N, 6), rows(3_000, 7)
    spec = {**SPEC, "cv": {"folds": 5, "assignment": "hash"}}  # hash folds: a new row gets the fold it would have had
    parent = tune(A, spec)
    body, arrays = parent.to_artifact()
    cont = continue_tune(body, arrays, B)
    AB = {k: np.concatenate([A[k], B[k]]) for k in A}
    twin = tune(AB, spec, basis=fixed_basis(body, arrays))
    assert gram_calls == [True, True]
    a = np.array([r["split_values"] for r in cont.cv_table])
    b = np.array([r["split_values"] for r in twin.cv_table])
    np.testing.assert_allclose(a, b, rtol=1e-9)
    np.testing.assert_allclose(cont.model.beta, twin.model.beta, rtol=0, atol=1e-9 * np.abs(twin.model.beta).max())


def test_fold_fits_from_the_scoring_equal_fits_made_again(monkeypatch):
    """With a categorical column the nested group is scored with its one-hot columns first and the model
    keeps them last: the scoring's fits are reordered, and equal the fold fits factored again."""
    rng = np.random.default_rng(8)
    d = rows(900, 8)
    d["station"] = rng.choice(["north", "south", "east"], 900).astype(object)
    d["y"] = d["y"] + (d["station"] == "south") * 0.8
    spec = {**SPEC, "categorical": ["station"],
            "bases": [{"kind": "polynomial", "degrees": [1, 2, 3]}, {"kind": "rbf", "centers": 20, "widths": [1.0]}]}
    for basis in ([{"kind": "polynomial", "degrees": [1, 2, 3]}], [{"kind": "rbf", "centers": 20, "widths": [1.0]}]):
        kept = tune(d, {**spec, "bases": basis})
        monkeypatch.setattr(T, "FOLD_PATHS_KEEP_BYTES", 0)
        again = tune(d, {**spec, "bases": basis})
        monkeypatch.undo()
        assert kept.chosen["index"] == again.chosen["index"]
        np.testing.assert_allclose(kept.model.fold_weights, again.model.fold_weights, rtol=0,
                                   atol=1e-10 * np.abs(again.model.fold_weights).max())
        np.testing.assert_allclose(kept.model.fold_intercepts, again.model.fold_intercepts, rtol=1e-10)


@pytest.mark.parametrize("degrees, chosen", [([1, 2, 3, 4], 3), ([2, 5], 5)])
def test_the_refit_leverage_screen_gives_every_rows_prediction_and_the_largest_leverage(monkeypatch, degrees, chosen):
    """From ``SCREEN_MIN_ROWS`` rows the refit predicts through the summaries' basis and gives the exact leverage
    only to the rows whose bound reaches the floor (``tune._leverage_screen``): a chosen degree below the
    group's widest (a basis made for it) and the widest itself (the summaries' own basis)."""
    from service.engine import orthobasis

    monkeypatch.setattr(T, "SCREEN_MIN_ROWS", 1_000)
    monkeypatch.setattr(T, "SCREEN_SAMPLE_ROWS", 500)
    monkeypatch.setattr(T, "CHUNK_ROWS", 600)  # many chunks, some where the screen keeps no row
    seen = [0, 0]  # rows kept by the screen, rows screened
    empty = [0]  # chunks where it kept none
    real = orthobasis.LeverageScreen.rows

    def spy(self, Xs, buf=None):
        keep, P = real(self, Xs, buf)
        seen[0] += keep.size
        seen[1] += Xs.shape[0]
        empty[0] += keep.size == 0
        return keep, P

    monkeypatch.setattr(orthobasis.LeverageScreen, "rows", spy)
    d = rows(N, 9)
    res = tune(d, {**SPEC, "bases": [{"kind": "polynomial", "degrees": degrees}]})
    assert res.chosen["basis"]["degree"] == chosen
    assert seen[1] == N and 0 < seen[0] < 0.05 * N  # every row screened, few given their exact leverage
    assert empty[0] > 0
    # each row's out-of-fold prediction: the scikit-learn fold model that did not see it (Ridge pipeline)
    lam = res.chosen["penalty"]["strength"]
    _, preds = sklearn_reference(d, chosen, lam)
    want = np.empty(N)
    for k, (_, te) in enumerate(KFold(5, shuffle=True, random_state=3).split(np.empty((N, 1)))):
        want[te] = preds[k][te]
    np.testing.assert_allclose(res.oof_predictions, want, rtol=0, atol=1e-9 * np.abs(want).max())
    # the largest training leverage: the ridge hat matrix's diagonal (ESL eq. 3.44, as above), computed directly
    Phi = res.model.design(d)[0]
    Z = (Phi - Phi.mean(0)) / Phi.std(0)
    h = 1.0 / N + np.einsum("ij,ij->i", Z @ np.linalg.inv(Z.T @ Z + lam * np.eye(Z.shape[1])), Z)
    assert res.model.max_leverage == pytest.approx(h.max(), rel=1e-9)
    # and the largest of every row's exact leverage (the screen off), to rounding
    monkeypatch.setattr(T, "SCREEN_MIN_ROWS", 10 * N)
    every = tune(d, {**SPEC, "bases": [{"kind": "polynomial", "degrees": degrees}]})
    assert res.model.max_leverage == pytest.approx(every.model.max_leverage, rel=1e-13)


def test_the_leverage_screen_leaves_out_rows_that_weigh_nothing(monkeypatch):
    """A zero-weight row far outside the others would hold the largest leverage if it counted: the screen keeps
    it (its bound is high) and must still leave it out, giving the largest over the rows that weigh something,
    as every row's exact leverage does (the screen off)."""
    monkeypatch.setattr(T, "SCREEN_MIN_ROWS", 1_000)
    monkeypatch.setattr(T, "SCREEN_SAMPLE_ROWS", 500)
    d = rows(N, 10)
    d["w"] = np.random.default_rng(11).uniform(0.5, 2.0, N)
    d["x3"][7], d["w"][7] = 9.0, 0.0  # far outside the others' range (uniform on [-2, 2]), weighing nothing
    spec = {**SPEC, "weight": "w", "bases": [{"kind": "polynomial", "degrees": [3]}]}
    screened = tune(d, spec)
    monkeypatch.setattr(T, "SCREEN_MIN_ROWS", 10 * N)
    every = tune(d, spec)
    assert screened.model.max_leverage == pytest.approx(every.model.max_leverage, rel=1e-13)
    np.testing.assert_allclose(screened.oof_predictions, every.oof_predictions, rtol=1e-11)
    # the outlier's own leverage under the model (what counting it would have given) is far above
    lev = screened.model.predict_detail({k: v[7:8] for k, v in d.items() if k not in ("y", "w")})
    assert float(np.asarray(lev["leverage"])[0]) > 2 * screened.model.max_leverage


def test_both_ways_of_expanding_give_the_same_bits(monkeypatch, gram_calls):
    """``_gram_summaries`` expands the rows in the calling thread (short jobs) or in each pool thread into its
    own buffer (from ``GRAM_THREADS_EXPAND_FROM`` rows): the chunks' Gram matrices are added in row order either
    way, so the summaries, the CV figures and the model are the same bits (weighted rows here, √w scaling)."""
    d = rows(N, 12)
    d["w"] = np.random.default_rng(13).uniform(0.2, 3.0, N)
    spec = {**SPEC, "weight": "w"}
    monkeypatch.setattr(T, "CHUNK_ROWS", 1_000)  # several chunks per atom, added up in row order
    monkeypatch.setattr(T, "GRAM_THREADS_EXPAND_FROM", 0)
    on_threads = tune(d, spec)
    monkeypatch.setattr(T, "GRAM_THREADS_EXPAND_FROM", 10 * N)
    here = tune(d, spec)
    assert gram_calls == [True, True]
    assert np.array_equal([r["split_values"] for r in on_threads.cv_table], [r["split_values"] for r in here.cv_table])
    assert np.array_equal(on_threads.model.beta, here.model.beta)
