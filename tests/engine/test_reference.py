"""The tuning engine checked against sources outside the project.

Sources, each named again beside its check:
- NIST Statistical Reference Datasets (StRD), linear regression: Longley, Wampler1, Wampler2, Filip and
  their certified values (itl.nist.gov/div898/strd/lls). The Longley data ships in
  ``statsmodels.datasets.longley``; the Wampler data are defined by their certified polynomials; the
  Filip data and certificate are transcribed below (see ``FILIP``) and cross-checked by an exact fit.
- scikit-learn as an independent implementation (Ridge, ElasticNet, StandardScaler,
  PolynomialFeatures, GridSearchCV, KFold) on the diabetes data that ships with scikit-learn
  (Efron, Hastie, Johnstone & Tibshirani, "Least Angle Regression", Annals of Statistics, 2004).
- Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed.: eq. 3.50 (effective
  degrees of freedom of ridge) and section 7.10 (leave-one-out cross-validation).
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_diabetes
from sklearn.linear_model import ElasticNet, Ridge
from sklearn.model_selection import GridSearchCV, KFold
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

from service.engine import tune


def lre(estimate: np.ndarray, certified: np.ndarray) -> np.ndarray:
    """Log relative error, as NIST StRD reports accuracy (McCullough, "Assessing the reliability of
    statistical software", The American Statistician 52(4), 1998)."""
    estimate = np.asarray(estimate, dtype=float)
    certified = np.asarray(certified, dtype=float)
    rel = np.abs(estimate - certified) / np.abs(certified)
    with np.errstate(divide="ignore"):
        return np.where(rel == 0, 15.0, -np.log10(rel))


def original_units(model) -> tuple[float, np.ndarray]:
    """Intercept and slopes of a linear-basis model on the raw inputs."""
    w = model.weights / model.scaler.scale  # Φ = (x − μ)/σ, so slope on x is w/σ
    b = model.intercept - np.sum(model.weights * model.scaler.mean / model.scaler.scale)
    return b, w


OLS = {"penalty": {"kind": "l2", "strengths": [0.0]}, "cv": {"folds": 3, "seed": 0}}


# ---- NIST StRD Longley -----------------------------------------------------------------------------
# Certified values: NIST StRD, dataset "Longley" (certified to 15 significant digits).
LONGLEY_CERT = np.array([-3482258.63459582, 15.0618722713733, -0.358191792925910e-01, -2.02022980381683,
                         -1.03322686717359, -0.511041056535807e-01, 1829.15146461355])
LONGLEY_RESIDUAL_SD = 304.854073561965  # NIST StRD Longley certificate


def test_longley_certified_coefficients_and_fit():
    sm_longley = pytest.importorskip("statsmodels.datasets.longley")
    df = sm_longley.load_pandas().data  # NIST StRD Longley, as shipped by statsmodels
    names = ["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]
    data = {c: df[c].to_numpy(float) for c in ["TOTEMP", *names]}
    res = tune(data, {"target": "TOTEMP", "features": names, "bases": [{"kind": "linear"}], **OLS})
    b, w = original_units(res.model)
    got = np.concatenate([[b], w])
    assert lre(got, LONGLEY_CERT).min() >= 10, lre(got, LONGLEY_CERT)
    fitted = res.model.predict(data)
    X = np.column_stack([np.ones(16)] + [data[c] for c in names])
    certified_fit = X @ LONGLEY_CERT
    assert lre(fitted, certified_fit).min() >= 10
    resid_sd = np.sqrt(np.sum((data["TOTEMP"] - fitted) ** 2) / (16 - 7))
    assert lre(resid_sd, LONGLEY_RESIDUAL_SD) >= 9


# ---- NIST StRD Wampler1 / Wampler2 -----------------------------------------------------------------
# Certified: Wampler1 y = 1 + x + x² + x³ + x⁴ + x⁵, Wampler2 y = 1 + 0.1x + ... + 1e-5 x⁵,
# x = 0, 1, ..., 20, residual standard deviation 0 (NIST StRD certificates).
@pytest.mark.parametrize("coefs", [[1, 1, 1, 1, 1, 1], [1, 1e-1, 1e-2, 1e-3, 1e-4, 1e-5]], ids=["wampler1", "wampler2"])
def test_wampler_certified_fit(coefs):
    x = np.arange(21, dtype=float)
    y = np.polynomial.polynomial.polyval(x, coefs)
    res = tune({"x": x, "y": y}, {"target": "y", "bases": [{"kind": "polynomial", "degrees": [5]}], **OLS})
    fitted = res.model.predict({"x": x})
    assert lre(fitted, y).min() >= 8, lre(fitted, y)


@pytest.mark.parametrize("coefs", [[1, 1, 1, 1, 1, 1], [1, 1e-1, 1e-2, 1e-3, 1e-4, 1e-5]], ids=["wampler1", "wampler2"])
def test_wampler_exact_fits_are_refused_by_the_gram_way(monkeypatch, coefs):
    # Residual standard deviation 0 (NIST StRD certificates): y lies in the span of the basis, so no Gram
    # matrix of [1, Ψ, y] can carry its residual; ``OrthoBasis.r_factor`` must refuse it (the streamed run
    # then summarizes those rows the exact way, tested in test_orthobasis.py)
    from service.engine import orthobasis
    from service.engine.basis import polynomial_powers

    monkeypatch.setattr(orthobasis, "MIN_SAMPLE_PER_TERM", 1)
    x = np.arange(21, dtype=float)
    y = np.polynomial.polynomial.polyval(x, coefs)
    Xs = ((x - x.mean()) / x.std())[:, None]
    basis = orthobasis.build(polynomial_powers(1, 5), Xs)
    P = basis.design(Xs, y)
    assert basis.r_factor(P.T @ P) is None
    assert basis.r_factor(P[:, :-1].T @ P[:, :-1]) is None  # the wrong width is refused too


# ---- NIST StRD Filip -------------------------------------------------------------------------------
# NIST StRD "Filip" (Filippelli, NIST; 82 observations, polynomial of degree 10, the hardest of the linear
# set): data (y, x) and certified coefficients B0..B10 as published on the NIST certificate
# (itl.nist.gov/div898/strd/lls/data/Filip.shtml), transcribed from the public-domain copy in the test
# file of Octave's optim package (P. Kienzle, wpolyfit tests). ``test_filip_transcription`` checks the
# transcription: an exact (60-digit, mpmath) least-squares fit of these data reproduces the certificate.
FILIP = np.array([
    (0.8116, -6.860120914), (0.9072, -4.324130045), (0.9052, -4.358625055), (0.9039, -4.358426747),
    (0.8053, -6.955852379), (0.8377, -6.661145254), (0.8667, -6.355462942), (0.8809, -6.118102026),
    (0.7975, -7.115148017), (0.8162, -6.815308569), (0.8515, -6.519993057), (0.8766, -6.204119983),
    (0.8885, -5.853871964), (0.8859, -6.109523091), (0.8959, -5.79832982), (0.8913, -5.482672118),
    (0.8959, -5.171791386), (0.8971, -4.851705903), (0.9021, -4.517126416), (0.909, -4.143573228),
    (0.9139, -3.709075441), (0.9199, -3.499489089), (0.8692, -6.300769497), (0.8872, -5.953504836),
    (0.89, -5.642065153), (0.891, -5.031376979), (0.8977, -4.680685696), (0.9035, -4.329846955),
    (0.9078, -3.928486195), (0.7675, -8.56735134), (0.7705, -8.363211311), (0.7713, -8.107682739),
    (0.7736, -7.823908741), (0.7775, -7.522878745), (0.7841, -7.218819279), (0.7971, -6.920818754),
    (0.8329, -6.628932138), (0.8641, -6.323946875), (0.8804, -5.991399828), (0.7668, -8.781464495),
    (0.7633, -8.663140179), (0.7678, -8.473531488), (0.7697, -8.247337057), (0.77, -7.971428747),
    (0.7749, -7.676129393), (0.7796, -7.352812702), (0.7897, -7.072065318), (0.8131, -6.774174009),
    (0.8498, -6.478861916), (0.8741, -6.159517513), (0.8061, -6.835647144), (0.846, -6.53165267),
    (0.8751, -6.224098421), (0.8856, -5.910094889), (0.8919, -5.598599459), (0.8934, -5.290645224),
    (0.894, -4.974284616), (0.8957, -4.64454848), (0.9047, -4.290560426), (0.9129, -3.885055584),
    (0.9209, -3.408378962), (0.9219, -3.13200249), (0.7739, -8.726767166), (0.7681, -8.66695597),
    (0.7665, -8.511026475), (0.7703, -8.165388579), (0.7702, -7.886056648), (0.7761, -7.588043762),
    (0.7809, -7.283412422), (0.7961, -6.995678626), (0.8253, -6.691862621), (0.8602, -6.392544977),
    (0.8809, -6.067374056), (0.8301, -6.684029655), (0.8664, -6.378719832), (0.8834, -6.065855188),
    (0.8898, -5.752272167), (0.8964, -5.132414673), (0.8963, -4.811352704), (0.9074, -4.098269308),
    (0.9119, -3.66174277), (0.9228, -3.2644011),
])
FILIP_CERT = np.array([-1467.48961422980, -2772.17959193342, -2316.37108160893, -1127.97394098372,
                       -354.478233703349, -75.1242017393757, -10.8753180355343, -1.06221498588947,
                       -0.670191154593408e-01, -0.246781078275479e-02, -0.402962525080404e-04])  # NIST certificate


def _filip_exact() -> np.ndarray:
    """The Filip least-squares coefficients from the data in 60-digit arithmetic (normal equations are
    harmless at that precision)."""
    mpmath = pytest.importorskip("mpmath")
    y, x = FILIP[:, 0], FILIP[:, 1]
    with mpmath.workdps(60):
        X = mpmath.matrix([[mpmath.mpf(float(v)) ** k for k in range(11)] for v in x])
        Y = mpmath.matrix([mpmath.mpf(float(v)) for v in y])
        beta = mpmath.lu_solve(X.T * X, X.T * Y)
        return np.array([float(b) for b in beta])


def test_filip_transcription():
    # the exact fit of the transcribed data agrees with the NIST certificate to ≥ 12 digits on every
    # coefficient (NIST certifies 15; a mistyped data value or digit would break this)
    exact = _filip_exact()
    assert lre(exact, FILIP_CERT).min() >= 12, lre(exact, FILIP_CERT)


def _raw_filip_coefficients(intercept: float, weights: np.ndarray, mu: float, sd: float) -> np.ndarray:
    """Coefficients of the raw powers of x from those of the standardized powers ((x − μ)/σ)^k, expanded
    in 60-digit arithmetic (so only the error of the given coefficients is measured)."""
    mpmath = pytest.importorskip("mpmath")
    with mpmath.workdps(60):
        mu, sd = mpmath.mpf(float(mu)), mpmath.mpf(float(sd))
        c = [mpmath.mpf(float(intercept))] + [mpmath.mpf(0)] * 10
        for k in range(1, 11):
            w = mpmath.mpf(float(weights[k - 1]))
            for j in range(k + 1):
                c[j] += w / sd ** k * mpmath.binomial(k, j) * (-mu) ** (k - j)
        return np.array([float(v) for v in c])


def test_filip_certified_coefficients():
    # NIST StRD Filip certificate: LRE ≥ 7 on every coefficient, via the engine's own path (degree-10
    # basis of the standardized input, summaries, solver); the coefficients of the raw powers of x are
    # recovered from the standardized ones in exact arithmetic, so only the engine's error is measured
    y, x = FILIP[:, 0], FILIP[:, 1]
    res = tune({"x": x, "y": y}, {"target": "y", "bases": [{"kind": "polynomial", "degrees": [10]}], **OLS})
    m = res.model
    got = _raw_filip_coefficients(m.intercept, m.weights, m.scaler.mean[0], m.scaler.scale[0])
    assert lre(got, FILIP_CERT).min() >= 7, lre(got, FILIP_CERT)


def _coefficients_from_r(R: np.ndarray) -> np.ndarray:
    """Least-squares coefficients from the R factor of [X, y]: β = R₁₁⁻¹ r (common practice)."""
    from scipy.linalg import solve_triangular

    return solve_triangular(R[:-1, :-1], R[:-1, -1])


def test_filip_through_one_gram_matrix_of_the_orthogonal_basis(monkeypatch):
    # NIST StRD Filip certificate, LRE ≥ 7 on every coefficient, with the R factor made the way a large
    # streamed run makes it (``engine.orthobasis``): orthogonal polynomials of the standardized input, ONE
    # Gram matrix of [1, Ψ, y], then the R factor of the monomials by a small QR. (Measured: LRE ≥ 13.9,
    # against ≥ 13.8 for Householder QR of the standardized monomials.) The basis asks for 20 sample rows per
    # column; here the 82 rows are the whole sample, as they would be for a source this small.
    from service.engine import orthobasis
    from service.engine.basis import polynomial_powers

    monkeypatch.setattr(orthobasis, "MIN_SAMPLE_PER_TERM", 1)
    y, x = FILIP[:, 0], FILIP[:, 1]
    mu, sd = x.mean(), x.std()
    Xs = ((x - mu) / sd)[:, None]
    basis = orthobasis.build(polynomial_powers(1, 10), Xs)
    P = basis.design(Xs, y)
    R = basis.r_factor(P.T @ P)
    assert R is not None  # accepted: κ of the column-scaled [1, Ψ, y] is about 550, below ORTHO_MAX_COND
    beta = _coefficients_from_r(R)
    got = _raw_filip_coefficients(beta[0], beta[1:], mu, sd)
    assert lre(got, FILIP_CERT).min() >= 7, lre(got, FILIP_CERT)


@pytest.mark.parametrize("force_shift", [False, True], ids=["chosen", "shifted"])
def test_cholesky_qr_r_on_filip_raw_powers(monkeypatch, force_shift):
    # The R factor through Cholesky QR, on the raw (unscaled) powers x⁰..x¹⁰ of Filip with y: a design
    # whose condition number is near 1/eps after column scaling. It must take a Cholesky path (not the
    # Householder fallback) and still give LRE ≥ 7 on every NIST certified coefficient.
    from service.engine import summaries

    if force_shift:
        monkeypatch.setattr(summaries, "CQR2_MAX_COND", 1.0)
    y, x = FILIP[:, 0], FILIP[:, 1]
    A = np.column_stack([x ** k for k in range(11)] + [y])
    R = summaries.cholesky_qr_r(A)
    assert R is not None
    assert lre(_coefficients_from_r(R), FILIP_CERT).min() >= 7, lre(_coefficients_from_r(R), FILIP_CERT)
    assert np.allclose(np.abs(np.diag(R)), np.abs(np.diag(summaries.householder_r(A))), rtol=1e-6)


@pytest.mark.parametrize("force_shift", [False, True], ids=["chosen", "shifted"])
def test_cholesky_qr_r_on_longley(monkeypatch, force_shift):
    # NIST StRD Longley certificate through the Cholesky R factor of the raw design [1, X, y]
    # (CholeskyQR2, and shifted CholeskyQR3 when forced): LRE ≥ 10 on every coefficient.
    from service.engine import summaries

    sm_longley = pytest.importorskip("statsmodels.datasets.longley")
    df = sm_longley.load_pandas().data  # NIST StRD Longley, as shipped by statsmodels
    names = ["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]
    if force_shift:
        monkeypatch.setattr(summaries, "CQR2_MAX_COND", 1.0)
    A = np.column_stack([np.ones(16)] + [df[c].to_numpy(float) for c in names] + [df["TOTEMP"].to_numpy(float)])
    R = summaries.cholesky_qr_r(A)
    assert R is not None
    assert lre(_coefficients_from_r(R), LONGLEY_CERT).min() >= 10, lre(_coefficients_from_r(R), LONGLEY_CERT)


def test_absorbed_blocks_on_filip(monkeypatch):
    # NIST StRD Filip certificate, the R factor built as a long pass builds it: the 82 rows in blocks of
    # 12, in file order, each block absorbed into the running R of the rows before it
    # (``summaries.absorb``), on the degree-10 basis of the standardized input. The first blocks cover
    # narrow ranges of x, so the next ones fall outside their span and are factored and merged instead;
    # the later ones take the absorbing step (a triangular solve and one Cholesky step). LRE ≥ 7 on every
    # certified coefficient either way.
    from service.engine import summaries

    taken = []
    real = summaries._absorbed
    monkeypatch.setattr(summaries, "_absorbed", lambda R, B: taken.append(real(R, B) is not None) or real(R, B))
    y, x = FILIP[:, 0], FILIP[:, 1]
    mu, sd = x.mean(), x.std()
    z = (x - mu) / sd
    A = np.column_stack([np.ones(x.size)] + [z ** k for k in range(1, 11)] + [y])
    R = None
    for lo in range(0, x.size, 12):
        R = summaries.absorb(R, A[lo:lo + 12])
    assert len(taken) == 6 and sum(taken) >= 4, taken
    beta = _coefficients_from_r(R)
    got = _raw_filip_coefficients(beta[0], beta[1:], mu, sd)
    assert lre(got, FILIP_CERT).min() >= 7, lre(got, FILIP_CERT)


def test_absorb_falls_back_where_the_running_r_cannot_serve():
    # RᵀR = AᵀA for the stacked rows (common practice: the defining property of an R factor), on the two
    # cases the absorbing step refuses: a running R that is singular (a repeated column) and a block far
    # outside the span of the rows before it (‖B R⁻¹‖ large)
    from service.engine import summaries

    rng = np.random.default_rng(3)
    X = rng.standard_normal((400, 4))
    twin = np.column_stack([X, X[:, :1]])  # a column repeated: every R of it is singular
    R = summaries.absorb(summaries.qr_r(twin[:200]), twin[200:])
    np.testing.assert_allclose(R.T @ R, twin.T @ twin, rtol=1e-12, atol=1e-10 * np.abs(twin.T @ twin).max())
    far = np.vstack([X[:200], 1e6 * X[200:]])
    assert summaries._absorbed(summaries.qr_r(far[:200]), far[200:]) is None
    R = summaries.absorb(summaries.qr_r(far[:200]), far[200:])
    np.testing.assert_allclose(R.T @ R, far.T @ far, rtol=1e-12, atol=1e-12 * np.abs(far.T @ far).max())


def _filip_standardized_design():
    y, x = FILIP[:, 0], FILIP[:, 1]
    mu, sd = x.mean(), x.std()
    z = (x - mu) / sd
    return np.column_stack([np.ones(x.size)] + [z ** k for k in range(1, 11)] + [y]), mu, sd


def test_preconditioned_sibling_and_triangular_merges_on_filip(monkeypatch):
    # NIST StRD Filip certificate (LRE ≥ 7 on every coefficient), the R factor built as the in-memory search
    # builds its fold summaries: the rows in three interleaved atoms (as folds draw them), the first
    # factored on its own, the others with its R as their first step (``summaries.preconditioned_r``), then
    # merged by triangular-pentagonal Householder QR (``summaries.merge``, LAPACK dtpqrt)
    from service.engine import summaries

    A, mu, sd = _filip_standardized_design()
    first = summaries.qr_r(A[0::3])
    taken = [summaries.preconditioned_r(first, A[k::3]) for k in (1, 2)]
    assert all(r is not None for r in taken)
    R = summaries.merge([first, *taken])
    beta = _coefficients_from_r(R)
    got = _raw_filip_coefficients(beta[0], beta[1:], mu, sd)
    assert lre(got, FILIP_CERT).min() >= 7, lre(got, FILIP_CERT)
    # and with the second Cholesky step forced (CholeskyQR2 of B P⁻¹)
    monkeypatch.setattr(summaries, "PRECOND_ONE_STEP", 1.0)
    R = summaries.merge([first, *[summaries.preconditioned_r(first, A[k::3]) for k in (1, 2)]])
    beta = _coefficients_from_r(R)
    assert lre(_raw_filip_coefficients(beta[0], beta[1:], mu, sd), FILIP_CERT).min() >= 7


def test_triangular_merge_on_longley():
    # NIST StRD Longley certificate (LRE ≥ 10 on every coefficient): the raw design [1, X, y] in two halves,
    # each factored by Householder QR, merged by ``summaries.merge`` (dtpqrt on the two triangles)
    from service.engine import summaries

    sm_longley = pytest.importorskip("statsmodels.datasets.longley")
    df = sm_longley.load_pandas().data  # NIST StRD Longley, as shipped by statsmodels
    names = ["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]
    A = np.column_stack([np.ones(16)] + [df[c].to_numpy(float) for c in names] + [df["TOTEMP"].to_numpy(float)])
    R = summaries.merge([summaries.householder_r(A[0::2]), summaries.householder_r(A[1::2])])
    assert np.all(np.diag(R) > 0)
    assert lre(_coefficients_from_r(R), LONGLEY_CERT).min() >= 10, lre(_coefficients_from_r(R), LONGLEY_CERT)


def test_preconditioned_r_refuses_what_it_cannot_serve():
    # RᵀR = BᵀB (common practice: the defining property of an R factor) where the sibling's R serves; None
    # where it cannot: a singular P, a block exploring a direction P's rows hardly do, fewer rows than columns
    from service.engine import summaries

    rng = np.random.default_rng(5)
    X = rng.standard_normal((600, 5)) @ rng.standard_normal((5, 5))
    P = summaries.qr_r(X[:300])
    R = summaries.preconditioned_r(P, 1e6 * X[300:])  # a scale changes no direction
    G = (1e6 * X[300:]).T @ (1e6 * X[300:])
    np.testing.assert_allclose(R.T @ R, G, rtol=1e-12, atol=1e-12 * np.abs(G).max())
    twin = np.column_stack([X[:, :4], X[:, :1]])
    assert summaries.preconditioned_r(summaries.householder_r(twin[:300]), twin[300:]) is None
    narrow = X[:300].copy()
    narrow[:, 3] = 1e-7 * narrow[:, 3] + narrow[:, 2]
    assert summaries.preconditioned_r(summaries.qr_r(narrow), X[300:]) is None
    assert summaries.preconditioned_r(P, X[300:303]) is None


# ---- Parity with scikit-learn's GridSearchCV -------------------------------------------------------
def _diabetes():
    X, y = load_diabetes(return_X_y=True)  # ships with scikit-learn (Efron et al., 2004)
    names = [f"x{j}" for j in range(X.shape[1])]
    return X, y, names, {**{n: X[:, j] for j, n in enumerate(names)}, "y": y}


def _standardized(X):
    std = X.std(axis=0)
    return (X - X.mean(axis=0)) / np.where(std > 0, std, 1.0)


def _grid_table(gs, degrees, alphas, key_alpha, key_ratio=None, ratios=(None,)):
    cv = gs.cv_results_
    k = gs.n_splits_
    out = {}
    for i, params in enumerate(cv["params"]):
        folds = [-cv[f"split{j}_test_score"][i] for j in range(k)]
        key = (params["poly__degree"], params.get(key_ratio) if key_ratio else None, params[key_alpha])
        out[key] = np.array(folds)
    return out


def test_l2_cv_table_equals_gridsearchcv():
    X, y, names, data = _diabetes()
    degrees, alphas = [1, 2, 3], np.geomspace(1e-3, 1e3, 12)
    spec = {"target": "y", "bases": [{"kind": "polynomial", "degrees": degrees}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e3, "count": 12}},
            "cv": {"scheme": "kfold", "folds": 5, "seed": 7}}
    res = tune(data, spec)
    # scikit-learn reference: the basis is fixed from all rows (standardize, then PolynomialFeatures),
    # the per-fold StandardScaler and Ridge run inside GridSearchCV with the same KFold.
    pipe = Pipeline([("poly", PolynomialFeatures(include_bias=False)), ("scale", StandardScaler()), ("ridge", Ridge())])
    gs = GridSearchCV(pipe, {"poly__degree": degrees, "ridge__alpha": alphas},
                      cv=KFold(5, shuffle=True, random_state=7), scoring="neg_root_mean_squared_error").fit(_standardized(X), y)
    ref = _grid_table(gs, degrees, alphas, "ridge__alpha")
    assert len(res.cv_table) == len(ref) == 36
    worst = 0.0
    for row in res.cv_table:
        want = ref[(row["basis"]["degree"], None, pytest.approx(row["strength"], rel=1e-12).expected)]
        got = np.array(row["split_values"])
        worst = max(worst, float(np.max(np.abs(got - want) / np.abs(want))))
        assert row["mean"] == pytest.approx(want.mean(), rel=1e-9)
        assert row["std"] == pytest.approx(want.std(), rel=1e-6, abs=1e-9)
    assert worst <= 1e-9, worst
    best = gs.best_params_
    assert res.chosen["basis"] == {"kind": "polynomial", "degree": best["poly__degree"]}
    assert res.chosen["penalty"]["strength"] == pytest.approx(best["ridge__alpha"], rel=1e-12)
    # the refit equals Pipeline.fit on all rows at the chosen point
    ref_pred = gs.best_estimator_.predict(_standardized(X))
    np.testing.assert_allclose(res.model.predict(data), ref_pred, rtol=1e-9)


@pytest.mark.parametrize("kind,ratios", [("l1", [1.0]), ("elastic_net", [0.3, 0.8])])
def test_sparse_cv_table_equals_gridsearchcv(kind, ratios):
    X, y, names, data = _diabetes()
    # At strengths below about 0.05 scikit-learn's own coordinate descent stops short of the minimum
    # on this strongly collinear degree-2 basis (ConvergenceWarning even at max_iter=200,000), so the
    # grid starts there; test_sparse_objective_at_least_as_low covers the harder end.
    degrees, alphas = [1, 2], [0.05, 0.2, 1.0, 5.0]
    spec = {"target": "y", "bases": [{"kind": "polynomial", "degrees": degrees}],
            "penalty": {"kind": kind, "strengths": alphas, **({"l1_ratios": ratios} if kind == "elastic_net" else {})},
            "cv": {"scheme": "kfold", "folds": 4, "seed": 3}}
    res = tune(data, spec)
    # scikit-learn reference with a tight tolerance, so both sides are at the objective's minimizer.
    pipe = Pipeline([("poly", PolynomialFeatures(include_bias=False)), ("scale", StandardScaler()),
                     ("enet", ElasticNet(tol=1e-12, max_iter=200_000))])
    gs = GridSearchCV(pipe, {"poly__degree": degrees, "enet__alpha": alphas, "enet__l1_ratio": ratios},
                      cv=KFold(4, shuffle=True, random_state=3), scoring="neg_root_mean_squared_error").fit(_standardized(X), y)
    ref = _grid_table(gs, degrees, alphas, "enet__alpha", "enet__l1_ratio")
    assert len(res.cv_table) == len(ref)
    for row in res.cv_table:
        want = ref[(row["basis"]["degree"], row["l1_ratio"], row["strength"])]
        np.testing.assert_allclose(row["split_values"], want, rtol=1e-6)
    best = gs.best_params_
    assert res.chosen["basis"]["degree"] == best["poly__degree"]
    assert res.chosen["penalty"]["strength"] == best["enet__alpha"]
    assert res.chosen["penalty"]["l1_ratio"] == best["enet__l1_ratio"]


def test_rbf_cv_table_equals_pipeline_on_the_same_centres():
    X, y, names, data = _diabetes()
    spec = {"target": "y", "features": names[:4], "bases": [{"kind": "rbf", "widths": [1.0, 2.0], "centers": 30}],
            "penalty": {"strengths": [0.01, 1.0, 100.0]}, "cv": {"folds": 5, "seed": 1}}
    res = tune(data, spec)
    Xs = _standardized(X[:, :4])
    centers = res.model.basis.centers
    from sklearn.cluster import KMeans

    # the centres are k-means centres of the standardized inputs (scikit-learn KMeans, same seed)
    ref_centers = KMeans(30, n_init=3, random_state=1).fit(Xs).cluster_centers_
    np.testing.assert_allclose(centers, ref_centers, rtol=1e-12)
    for width in (1.0, 2.0):
        d2 = ((Xs[:, None, :] - centers[None, :, :]) ** 2).sum(-1)
        Phi = np.exp(-d2 / (2 * width**2))  # RBF definition, written out directly
        for alpha in (0.01, 1.0, 100.0):
            folds = []
            for tr, te in KFold(5, shuffle=True, random_state=1).split(Phi):
                m = Pipeline([("s", StandardScaler()), ("r", Ridge(alpha=alpha))]).fit(Phi[tr], y[tr])
                folds.append(np.sqrt(np.mean((y[te] - m.predict(Phi[te])) ** 2)))
            row = next(r for r in res.cv_table if r["basis"].get("width") == width and r["strength"] == alpha)
            np.testing.assert_allclose(row["split_values"], folds, rtol=1e-9)


# ---- effective degrees of freedom and exact leave-one-out -------------------------------------------
def test_effective_df_equals_trace_of_hat_matrix():
    X, y, names, data = _diabetes()
    res = tune(data, {"target": "y", "bases": [{"kind": "polynomial", "degrees": [2]}],
                      "penalty": {"strengths": [0.0, 0.1, 3.0, 100.0]}, "cv": {"folds": 3}})
    Phi = PolynomialFeatures(2, include_bias=False).fit_transform(_standardized(X))
    Z = StandardScaler().fit_transform(Phi)
    for lam, df in zip(res.path["strengths"], res.path["df"]):
        # ESL eq. 3.50: df(λ) = tr[Z (ZᵀZ + λI)⁻¹ Zᵀ], computed directly
        H = Z @ np.linalg.pinv(Z.T @ Z + lam * np.eye(Z.shape[1])) @ Z.T
        assert df == pytest.approx(np.trace(H), abs=1e-10 * Z.shape[1])


def test_exact_loo_equals_brute_force_refits():
    X, y, names, data = _diabetes()
    n = 80
    sub = {k: v[:n] for k, v in data.items()}
    strengths = [0.01, 1.0, 30.0]
    res = tune(sub, {"target": "y", "features": names[:5], "bases": [{"kind": "polynomial", "degrees": [1, 2]}],
                     "penalty": {"strengths": strengths}, "cv": {"scheme": "loo"}})
    Xs = _standardized(X[:n, :5])
    for degree in (1, 2):
        Z = StandardScaler().fit_transform(PolynomialFeatures(degree, include_bias=False).fit_transform(Xs))
        for lam in strengths:
            errs = []
            for i in range(n):  # brute force: n refits with scikit-learn's Ridge (intercept refit each time)
                keep = np.arange(n) != i
                m = Ridge(alpha=lam).fit(Z[keep], y[:n][keep])
                errs.append(y[i] - m.predict(Z[i:i + 1])[0])
            want = np.sqrt(np.mean(np.square(errs)))
            row = next(r for r in res.cv_table if r["basis"]["degree"] == degree and r["strength"] == lam)
            assert row["mean"] == pytest.approx(want, rel=1e-9)


def test_sparse_objective_at_least_as_low_as_scikit_learn():
    """Where coordinate descent converges slowly (small strength, collinear basis), our solution
    reaches an ElasticNet objective at least as low as scikit-learn's own (independent reference)."""
    import warnings

    from service.engine.solvers import fit_enet
    from service.engine.summaries import Summary

    X, y, _, _ = _diabetes()
    Phi = PolynomialFeatures(2, include_bias=False).fit_transform(_standardized(X))
    Z = StandardScaler().fit_transform(Phi)
    n = len(y)
    for alpha, ratio in [(0.01, 1.0), (0.003, 0.5)]:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = ElasticNet(alpha=alpha, l1_ratio=ratio, tol=1e-12, max_iter=200_000).fit(Z, y)
        ours = fit_enet(Summary.of(Phi, y), np.array([alpha]), ratio).beta[0]

        def objective(b, c):  # scikit-learn's ElasticNet objective, written out
            r = y - c - Z @ b
            return r @ r / (2 * n) + alpha * ratio * np.abs(b).sum() + alpha * (1 - ratio) / 2 * b @ b

        assert objective(ours, y.mean()) <= objective(ref.coef_, ref.intercept_) * (1 + 1e-14)
