"""The in-place, column-major expansion used by passes over many rows gives exactly the basis that
``BasisSetting.expand`` gives (itself checked against scikit-learn's PolynomialFeatures in
test_tune.py / test_reference.py), and that scikit-learn gives."""

from __future__ import annotations

import numpy as np
from sklearn.preprocessing import PolynomialFeatures

from service.engine.basis import BasisSetting, polynomial_powers


def test_expand_into_equals_expand_and_polynomial_features():
    rng = np.random.default_rng(3)
    X = rng.standard_normal((500, 3))
    s = BasisSetting("polynomial", degree=5, powers=polynomial_powers(3, 5))
    out = np.empty((500, s.n_terms(3)), order="F")
    s.expand_into(X, out)
    assert np.array_equal(out, s.expand(X))  # the same products in the same order: identical values
    # scikit-learn's PolynomialFeatures as an independent reference (same column order)
    ref = PolynomialFeatures(5, include_bias=False).fit_transform(X)
    np.testing.assert_allclose(out, ref, rtol=1e-13, atol=1e-13)


def test_expand_into_a_slice_of_a_wider_design():
    # the streamed design writes the basis after the one-hot block, into a column slice of one array
    rng = np.random.default_rng(4)
    X = rng.standard_normal((64, 2))
    s = BasisSetting("polynomial", degree=3, powers=polynomial_powers(2, 3))
    D = np.full((64, 2 + s.n_terms(2)), -7.0, order="F")
    s.expand_into(X, D[:, 2:])
    assert np.all(D[:, :2] == -7.0)
    assert np.array_equal(D[:, 2:], s.expand(X))
