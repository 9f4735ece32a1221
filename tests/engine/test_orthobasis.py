"""Fold summaries from one Gram matrix of a well-conditioned basis (``engine.orthobasis``), and the screen of
pass 3's largest leverage.

References:
- LAPACK's Householder QR (``scipy.linalg.qr``), backward stable (common practice), for the R factor of the
  monomial design itself;
- scikit-learn's ``LinearRegression`` for the least-squares coefficients an R factor gives;
- the in-memory engine (itself checked against scikit-learn in test_reference.py) for whole streamed runs.
Data: the diabetes set that ships with scikit-learn (Efron et al., 2004), three of its inputs (two of them
correlated at about 0.5 there), its rows repeated where a test needs more.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy.linalg import qr
from sklearn.datasets import load_diabetes
from sklearn.linear_model import LinearRegression

from service.engine import orthobasis, streaming, tune
from service.engine.basis import BasisSetting, polynomial_powers
from service.engine.orthobasis import LeverageScreen
from service.engine.solvers import row_leverages
from service.engine.streaming import tune_partitions
from service.sources import open_source


def inputs(repeat=1):
    X, y = load_diabetes(return_X_y=True)
    X = np.tile(X[:, [0, 2, 3]], (repeat, 1))  # age, bmi, blood pressure
    y = np.tile(y, repeat)
    return (X - X.mean(axis=0)) / X.std(axis=0), y


def monomials(Xs, y, degree):
    s = BasisSetting("polynomial", degree=degree, powers=polynomial_powers(Xs.shape[1], degree))
    A = np.empty((Xs.shape[0], s.powers.shape[0] + 2), order="F")
    A[:, 0] = 1.0
    s.expand_into(Xs, A[:, 1:-1])
    A[:, -1] = y
    return s, A


def test_the_basis_spans_the_monomials_exactly():
    # [1, Φ, y] = [1, Ψ, y] N, row by row, to rounding (the definition of N: module docstring)
    Xs, y = inputs()
    s, A = monomials(Xs, y, 3)
    b = orthobasis.build(s.powers, Xs)
    assert b is not None and b.N.shape == (A.shape[1],) * 2
    np.testing.assert_allclose(b.design(Xs, y) @ b.N, A, rtol=0, atol=1e-12 * np.abs(A).max())
    # and better conditioned than the monomials, the point of it (degree 4 here: 7.7 against 31; on
    # bench_scale's data, degree 6: 31 against 1e5)
    Xs, y = inputs(repeat=2)  # 35 columns need 700 sample rows
    s, A = monomials(Xs, y, 4)
    P = orthobasis.build(s.powers, Xs).design(Xs, y)[:, :-1]
    cond = [np.linalg.cond(M / np.linalg.norm(M, axis=0)) for M in (P, A[:, :-1])]
    assert cond[0] < cond[1] / 3


def test_the_r_factor_from_one_gram_is_householders():
    Xs, y = inputs(repeat=2)
    s, A = monomials(Xs, y, 3)
    b = orthobasis.build(s.powers, Xs)
    Psi = b.design(Xs, y)
    R = b.r_factor(Psi.T @ Psi)
    assert R is not None and np.all(np.diag(R) > 0) and not np.any(np.tril(R, -1))
    H = qr(A, mode="r")[0][:A.shape[1]]  # LAPACK Householder QR (backward stable: common practice)
    H *= np.sign(np.diag(H))[:, None]
    scale = np.linalg.norm(A, axis=0)
    np.testing.assert_allclose(R / scale, H / scale, rtol=0, atol=1e-12)
    # ‖R v‖ = ‖A v‖ in every direction, the weakest included (the definition of an R factor)
    v = np.linalg.svd(H)[2][-1]
    assert np.linalg.norm(R @ v) == pytest.approx(np.linalg.norm(A @ v), rel=1e-11)
    # the least-squares fit it gives is scikit-learn's
    coef = np.linalg.solve(R[1:-1, 1:-1], R[1:-1, -1])
    ref = LinearRegression().fit(A[:, 1:-1], y)
    np.testing.assert_allclose(coef, ref.coef_, rtol=1e-9, atol=1e-9 * np.abs(ref.coef_).max())


def test_what_the_gram_cannot_carry_is_refused():
    Xs, y = inputs()
    s, A = monomials(Xs, y, 3)
    b = orthobasis.build(s.powers, Xs)
    # a target the basis fits exactly: [1, Ψ, y] is singular, its Gram matrix cannot give the residual
    exact = A[:, 1:-1] @ np.linspace(1.0, 2.0, A.shape[1] - 2)
    P = b.design(Xs, exact)
    assert b.r_factor(P.T @ P) is None
    # fewer rows than columns: no R factor from a Gram matrix
    P = b.design(Xs[:10], y[:10])
    assert b.r_factor(P.T @ P) is None
    G = b.design(Xs, y)
    G = G.T @ G
    G[0, 0] = np.nan
    assert b.r_factor(G) is None
    assert b.r_factor(np.eye(3)) is None  # the wrong width


def test_the_basis_is_not_built_where_it_cannot_hold():
    Xs, _ = inputs()
    powers = polynomial_powers(3, 3)
    assert orthobasis.build(powers[:-1], Xs) is None  # not every monomial of total degree ≤ 3
    assert orthobasis.build(powers, Xs[:100]) is None  # too few sample rows for 20 columns
    coarse = Xs.copy()
    coarse[:, 1] = np.sign(coarse[:, 1])  # two distinct values: no orthogonal polynomial of degree 2
    assert orthobasis.build(powers, coarse) is None
    collinear = np.column_stack([Xs[:, 0], Xs[:, 1], Xs[:, 0] + Xs[:, 1]])
    assert orthobasis.build(powers, collinear) is None


def test_the_screen_bounds_every_leverage_and_keeps_the_largest():
    # h = 1/n + ‖T (d − mean)‖² (solvers.row_leverages) for a ridge factor T: the bound is at or above it on
    # every row, and a floor taken from some rows keeps the row that holds the maximum
    Xs, y = inputs(repeat=3)
    s, A = monomials(Xs, y, 4)
    D = A[:, 1:-1]
    n, p = D.shape
    mean, scale = D.mean(axis=0), D.std(axis=0)
    Z = (D - mean) / scale
    F = np.linalg.cholesky(np.linalg.inv(Z.T @ Z + 0.3 * np.eye(p))).T  # FᵀF = (ZᵀZ + λI)⁻¹
    from service.engine.solvers import leverage_triangle

    T = leverage_triangle(F, scale)
    h = row_leverages(D.copy(order="F"), mean, T, n)  # it overwrites its design
    np.testing.assert_allclose(h, 1 / n + np.einsum("ij,ij->i", Z @ F.T, Z @ F.T), rtol=1e-10)  # the definition
    b = orthobasis.build(s.powers, Xs)
    fw = np.random.default_rng(0).standard_normal((5, p))
    floor = float(h[:100].max())  # some rows' largest, below the largest of all here
    assert floor < h.max()
    screen = LeverageScreen.of(b, mean, T, n, floor, fw)
    rows, pred = screen.rows(Xs)
    assert int(np.argmax(h)) in rows and np.all(np.isin(np.flatnonzero(h >= floor), rows))
    assert rows.size < 0.25 * n  # it screens
    np.testing.assert_allclose(pred, D @ fw.T, rtol=1e-10, atol=1e-10 * np.abs(D @ fw.T).max())
    # a floor at zero keeps every row; a higher floor keeps fewer, never a row the lower one dropped
    assert LeverageScreen.of(b, mean, T, n, 0.0).rows(Xs)[0].size == n
    higher = LeverageScreen.of(b, mean, T, n, float(h.max())).rows(Xs)[0]
    assert higher.size < rows.size and np.all(np.isin(higher, rows)) and int(np.argmax(h)) in higher


SPEC = {"target": "y", "features": ["age", "bmi", "bp"],
        "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]}],
        "penalty": {"strengths": {"min": 1e-3, "max": 1e3, "count": 10}},
        "cv": {"folds": 5, "seed": 3, "assignment": "hash"}, "execution": {"batch_rows": 300}}


def source(tmp_path, repeat=4):
    Xs, y = inputs(repeat)
    X, _ = load_diabetes(return_X_y=True)
    raw = np.tile(X[:, [0, 2, 3]], (repeat, 1))
    d = {"age": raw[:, 0], "bmi": raw[:, 1], "bp": raw[:, 2], "y": y}
    pq.write_table(pa.table(d), tmp_path / "rows.parquet", row_group_size=500)
    schema, parts = open_source(tmp_path / "rows.parquet")
    return d, schema, parts


def spy(monkeypatch):
    calls = {"exact": 0, "reads": 0, "screen": []}
    exact, screen, blocks = streaming._absorbed_folds, streaming._leverage_screen, streaming._fold_blocks

    def counted(*a, **k):
        calls["exact"] += 1
        return exact(*a, **k)

    def read(*a, **k):
        calls["reads"] += 1
        return blocks(*a, **k)

    def kept(*a, **k):
        out = screen(*a, **k)
        calls["screen"].append(out)
        return out

    monkeypatch.setattr(streaming, "_absorbed_folds", counted)
    monkeypatch.setattr(streaming, "_fold_blocks", read)
    monkeypatch.setattr(streaming, "_leverage_screen", kept)
    return calls


def test_a_streamed_run_by_gram_matrices_gives_the_in_memory_answer(tmp_path, monkeypatch):
    d, schema, parts = source(tmp_path)
    mem = tune(d, SPEC)
    exact = tune_partitions(parts, schema, SPEC)  # 1,768 rows: below GRAM_MIN_ROWS, the exact way
    monkeypatch.setattr(streaming, "GRAM_MIN_ROWS", 0)
    calls = spy(monkeypatch)
    fast = tune_partitions(parts, schema, SPEC)
    assert calls["exact"] == 0 and calls["screen"][0] is not None  # the Gram way and the screen were taken
    assert fast.chosen["basis"] == mem.chosen["basis"] == {"kind": "polynomial", "degree": 3}
    for a, b in zip(mem.cv_table, fast.cv_table):
        assert (a["basis"], a["strength"]) == (b["basis"], b["strength"])
        np.testing.assert_allclose(b["split_values"], a["split_values"], rtol=1e-9)
    assert fast.chosen["penalty"] == mem.chosen["penalty"]
    rows = {k: v[:40] for k, v in d.items() if k != "y"}
    np.testing.assert_allclose(fast.model.predict(rows), mem.model.predict(rows), rtol=1e-9)
    # pass 3 through the screen: the same largest leverage and residuals as every row's exact computation
    assert fast.model.max_leverage == pytest.approx(exact.model.max_leverage, rel=1e-12)
    np.testing.assert_allclose(np.sort(fast.model.residuals), np.sort(exact.model.residuals), rtol=1e-9,
                               atol=1e-9 * np.abs(exact.model.residuals).max())
    # and the same bits on one thread and two
    again = tune_partitions(parts, schema, SPEC, threads=1)
    (b1, a1), (b2, a2) = again.to_artifact(), tune_partitions(parts, schema, SPEC, threads=2).to_artifact()
    assert b1 == b2 and all(np.array_equal(a1[k], a2[k]) for k in a1)


def test_a_target_the_basis_fits_exactly_takes_the_exact_way(tmp_path, monkeypatch):
    d, schema, parts = source(tmp_path)
    d["y"] = 3.0 + 2.0 * d["bmi"] - d["age"] * d["bp"]  # a degree-2 polynomial of the inputs, no noise
    pq.write_table(pa.table(d), tmp_path / "rows.parquet", row_group_size=500)
    schema, parts = open_source(tmp_path / "rows.parquet")
    monkeypatch.setattr(streaming, "GRAM_MIN_ROWS", 0)
    calls = spy(monkeypatch)
    fast = tune_partitions(parts, schema, SPEC)
    # the Gram matrices were refused and the rows summarized the exact way from the rows the Gram pass kept
    # (1,768 rows, under GRAM_HOLD_ROWS): the partition read once
    assert calls["exact"] == 1 and calls["reads"] == 1
    mem = tune(d, SPEC)
    assert fast.chosen["basis"] == mem.chosen["basis"]
    rows = {k: v[:40] for k, v in d.items() if k != "y"}
    np.testing.assert_allclose(fast.model.predict(rows), mem.model.predict(rows), rtol=1e-9, atol=1e-9)
    # a partition larger than what the Gram pass keeps is read again, with the same result
    monkeypatch.setattr(streaming, "GRAM_HOLD_ROWS", 100)
    calls.update(exact=0, reads=0)
    again = tune_partitions(parts, schema, SPEC)
    assert calls["exact"] == 1 and calls["reads"] == 2
    (b1, a1), (b2, a2) = fast.to_artifact(), again.to_artifact()
    assert b1 == b2 and all(np.array_equal(a1[k], a2[k]) for k in a1)


def test_dask_workers_summarize_by_gram_matrices_too(tmp_path, monkeypatch):
    # The basis and the screen are made on the driver and travel with the tasks: three partitions on a
    # LocalCluster give the in-process answer (the same partitions, merged the same way) to rounding.
    pytest.importorskip("distributed")
    from service.engine.executors import DaskExecutor

    d, _, _ = source(tmp_path)
    folder = tmp_path / "parts"
    folder.mkdir()
    for i, (lo, hi) in enumerate([(0, 600), (600, 1200), (1200, len(d["y"]))]):
        pq.write_table(pa.table({k: v[lo:hi] for k, v in d.items()}), folder / f"part-{i}.parquet")
    schema, parts = open_source(folder)
    monkeypatch.setattr(streaming, "GRAM_MIN_ROWS", 0)
    calls = spy(monkeypatch)
    here = tune_partitions(parts, schema, SPEC)
    assert calls["exact"] == 0 and calls["screen"][0] is not None
    ex = DaskExecutor("local", workers=2)
    try:
        there = tune_partitions(parts, schema, SPEC, executor=ex)
    finally:
        ex.close()
    assert there.summary["executor"].startswith("dask")
    for a, b in zip(here.cv_table, there.cv_table):
        np.testing.assert_allclose(b["split_values"], a["split_values"], rtol=1e-12)
    assert there.chosen == here.chosen
    assert there.model.max_leverage == pytest.approx(here.model.max_leverage, rel=1e-12)
