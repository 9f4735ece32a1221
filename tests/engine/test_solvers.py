"""The elastic-net solver: at the optimum (KKT conditions), equal to scikit-learn where that converges,
and loud where it does not.

References named beside each check: the KKT (subgradient) conditions of the elastic-net objective
(Hastie, Tibshirani & Wainwright, *Statistical Learning with Sparsity*, 2015, §2.2 / §4.2, from memory),
and scikit-learn's ElasticNet as an independent implementation. Data: the diabetes set that ships
with scikit-learn (Efron et al., 2004), degree-2 basis (strongly collinear).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from sklearn.datasets import load_diabetes
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import ElasticNet
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

from service.engine import solvers, tune
from service.engine.solvers import fit_enet
from service.engine.summaries import Summary


def basis():
    X, y = load_diabetes(return_X_y=True)  # ships with scikit-learn (Efron et al., 2004)
    Phi = PolynomialFeatures(2, include_bias=False).fit_transform((X - X.mean(0)) / X.std(0))
    return Phi, y


def kkt_violation(Z, y, beta, alpha, ratio):
    """Largest violation / α of the elastic-net subgradient conditions, from the rows: with
    r = y − ȳ − Zβ and s = Zᵀr / n, a nonzero β_j needs s_j = αρ sign β_j + α(1−ρ) β_j and a zero one
    |s_j| ≤ αρ (KKT conditions of scikit-learn's objective)."""
    n = y.size
    s = Z.T @ (y - y.mean() - Z @ beta) / n
    on = beta != 0
    v_on = np.abs(s[on] - alpha * ratio * np.sign(beta[on]) - alpha * (1 - ratio) * beta[on])
    v_off = np.maximum(np.abs(s[~on]) - alpha * ratio, 0.0)
    return float(max(v_on.max(initial=0.0), v_off.max(initial=0.0))) / alpha


@pytest.mark.parametrize("ratio", [1.0, 0.5])
def test_small_strengths_reach_the_optimum(ratio):
    Phi, y = basis()
    Z = StandardScaler().fit_transform(Phi)
    Z[:, Phi.std(0) < 1e-12] = 0.0
    strengths = np.geomspace(1e-4, 10, 15)
    f = fit_enet(Summary.of(Phi, y), strengths, ratio)
    for alpha, beta, k in zip(strengths, f.beta, f.kkt):
        v = kkt_violation(Z, y, beta, alpha, ratio)
        assert v <= 1e-6, (alpha, v)  # KKT conditions hold at the optimum
        assert k == pytest.approx(v, rel=1e-3, abs=1e-8)  # and the solver reports its own violation


def test_elastic_net_equals_scikit_learn_where_it_converges():
    Phi, y = basis()
    Z = StandardScaler().fit_transform(Phi)
    strengths = np.array([0.02, 0.1, 1.0, 5.0])
    for ratio in (0.3, 0.9, 1.0):
        f = fit_enet(Summary.of(Phi, y), strengths, ratio)
        for alpha, beta in zip(strengths, f.beta):
            with warnings.catch_warnings():
                warnings.simplefilter("error", ConvergenceWarning)
                try:
                    ref = ElasticNet(alpha=alpha, l1_ratio=ratio, tol=1e-13, max_iter=500_000).fit(Z, y)
                except ConvergenceWarning:
                    continue
            # fitted values: unique even where collinear columns leave the lasso's coefficients not unique
            np.testing.assert_allclose(Z @ beta, Z @ ref.coef_, rtol=1e-7, atol=1e-7 * np.abs(Z @ ref.coef_).max())
            if ratio < 1:  # strictly convex: the coefficients themselves are unique (scikit-learn reference)
                np.testing.assert_allclose(beta, ref.coef_, rtol=1e-6, atol=1e-8 * np.abs(ref.coef_).max())


def test_a_fit_that_stops_short_is_named_on_the_version(monkeypatch):
    X, y = load_diabetes(return_X_y=True)
    data = {**{f"x{j}": X[:, j] for j in range(10)}, "y": y}
    monkeypatch.setattr(solvers, "KKT_TOL", -1.0)  # every fit now counts as stopped short
    res = tune(data, {"target": "y", "bases": [{"kind": "linear"}],
                      "penalty": {"kind": "l1", "strengths": [0.5, 2.0]}, "cv": {"folds": 3}})
    msg = next(w for w in res.warnings if "stopped short" in w)
    assert "l1_ratio 1: strengths 0.5, 2" in msg
    monkeypatch.setattr(solvers, "KKT_TOL", 1e-6)
    res = tune(data, {"target": "y", "bases": [{"kind": "linear"}],
                      "penalty": {"kind": "l1", "strengths": [0.5, 2.0]}, "cv": {"folds": 3}})
    assert not any("stopped short" in w for w in res.warnings)
