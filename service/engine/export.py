"""A fitted model in forms that leave the service: a self-contained JSON description, and a scikit-learn
``Pipeline`` for analysts' notebooks.

The JSON form (``EXPORT_FORMAT`` = "tikhon-export", version ``EXPORT_VERSION``) holds everything needed to
evaluate the model anywhere, with no code of ours::

    x (d numeric inputs)            → z = (x − input.mean) / input.scale                 (d,)
    z                               → φ = basis(z)                                        (p_b,)
        linear:      φ = z
        polynomial:  φⱼ = Πᵢ zᵢ^powers[j][i]                       (powers: (p_b, d) exponents)
        rbf:         φⱼ = exp(−‖z − centers[j]‖² / (2 · width²))   (centers: (p_b, d), standardized units)
    categorical column c with levels Lc → one indicator per level (all zero for a level not in Lc)
    ŷ = intercept + Σⱼ weights[j] · [φ, indicators]ⱼ                (weights: (p,) on the raw columns)

``weights`` are the coefficients of the unscaled design columns (the penalty was applied to centred,
scaled columns; that scaling is folded in, as in ``FittedModel.weights``), so the evaluator needs no column
scaling. Training ranges, the chosen penalty and the CV figure ride along for the reader's information.

The scikit-learn form is a ``Pipeline`` of ``ColumnTransformer`` (``StandardScaler`` with the stored mean and
scale, then ``PolynomialFeatures`` or an RBF ``Nystroem`` map on the stored centres; ``OneHotEncoder`` with the
stored levels) and a ``LinearRegression`` holding the weights. Its ``predict`` on a pandas DataFrame with the
input columns equals ``FittedModel.predict`` to rounding (the pipeline sums in another order).
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

from service.errors import InvalidData

from .model import FittedModel

EXPORT_FORMAT = "tikhon-export"
EXPORT_VERSION = 1
SKLEARN_TOLERANCE = 1e-9  # relative: a pipeline that disagrees more than this with the model is not written


def export_json(model: FittedModel) -> dict[str, Any]:
    """The model as plain JSON values (lists and numbers): see the module docstring for the formula."""
    basis: dict[str, Any] = {"kind": model.basis.kind}
    if model.basis.kind == "polynomial":
        basis["degree"] = int(model.basis.degree)
        basis["powers"] = np.asarray(model.basis.powers, dtype=np.int64).tolist()
    elif model.basis.kind == "rbf":
        basis["width"] = float(model.basis.width)
        basis["centers"] = np.asarray(model.basis.centers, dtype=np.float64).tolist()
    return {
        "format": EXPORT_FORMAT,
        "format_version": EXPORT_VERSION,
        "target": model.target,
        "inputs": {
            "numeric": list(model.features),
            "mean": np.asarray(model.scaler.mean, dtype=np.float64).tolist(),
            "scale": np.asarray(model.scaler.scale, dtype=np.float64).tolist(),
        },
        "basis": basis,
        "categorical": [{"name": n, "levels": list(lv)} for n, lv in zip(model.categories.names, model.categories.levels)],
        "terms": list(model.term_names),
        "weights": np.asarray(model.weights, dtype=np.float64).tolist(),
        "intercept": float(model.intercept),
        "penalty": dict(model.penalty),
        "cv": {k: v for k, v in model.cv.items() if k in ("metric", "mean", "std", "scheme", "rule")},
        "training": {"rows": int(model.n_train),
                     "ranges": {k: [float(a), float(b)] for k, (a, b) in model.ranges.items()}},
    }


def sklearn_pipeline(model: FittedModel):
    """A fitted scikit-learn ``Pipeline`` whose ``predict(DataFrame)`` equals ``model.predict`` (to rounding).

    Raises ``InvalidData`` when the pipeline cannot reproduce the model within ``SKLEARN_TOLERANCE`` on
    probe rows spread over the training ranges (so a file that disagrees is never handed out)."""
    import pandas as pd
    from sklearn.compose import ColumnTransformer
    from sklearn.kernel_approximation import Nystroem
    from sklearn.linear_model import LinearRegression
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import OneHotEncoder, PolynomialFeatures, StandardScaler

    features = list(model.features)
    cats = list(model.categories.names)
    probe = _probe_frame(model, pd)
    d = len(features)
    weights = np.asarray(model.weights, dtype=np.float64)
    p_basis = weights.size - model.categories.width

    parts = []
    basis_weights = weights[:p_basis]
    if d:
        steps: list[tuple[str, Any]] = [("scale", StandardScaler())]
        if model.basis.kind == "polynomial":
            steps.append(("basis", PolynomialFeatures(degree=int(model.basis.degree), include_bias=False)))
        elif model.basis.kind == "rbf":
            m = int(model.basis.centers.shape[0])
            steps.append(("basis", Nystroem(kernel="rbf", gamma=1.0 / (2.0 * float(model.basis.width) ** 2),
                                            n_components=m)))
        numeric = Pipeline(steps)
        parts.append(("numeric", numeric, features))
    if cats:
        parts.append(("categorical", OneHotEncoder(categories=[list(lv) for lv in model.categories.levels],
                                                   handle_unknown="ignore", sparse_output=False, dtype=np.float64),
                      cats))
    columns = ColumnTransformer(parts, remainder="drop", sparse_threshold=0.0, verbose_feature_names_out=True)
    pipe = Pipeline([("columns", columns), ("linear", LinearRegression())])
    with warnings.catch_warnings():  # Nystroem warns that the probe has fewer rows than centres: it is refitted below
        warnings.simplefilter("ignore", UserWarning)
        columns.fit(probe)  # fits the structure (column lists, encoders); the numbers are set below

    if d:
        numeric = columns.named_transformers_["numeric"]
        scaler = numeric.named_steps["scale"]
        scaler.mean_ = np.asarray(model.scaler.mean, dtype=np.float64).copy()
        scaler.scale_ = np.asarray(model.scaler.scale, dtype=np.float64).copy()
        scaler.var_ = scaler.scale_ ** 2
        if model.basis.kind == "polynomial":
            poly = numeric.named_steps["basis"]
            # PolynomialFeatures orders its terms its own way: place each of our weights on its term.
            where = {tuple(int(e) for e in row): j for j, row in enumerate(poly.powers_)}
            mapped = np.zeros(len(where))
            for w, row in zip(basis_weights, np.asarray(model.basis.powers)):
                mapped[where[tuple(int(e) for e in row)]] = w
            basis_weights = mapped
        elif model.basis.kind == "rbf":
            ny = numeric.named_steps["basis"]
            ny.components_ = np.asarray(model.basis.centers, dtype=np.float64).copy()
            ny.component_indices_ = np.arange(ny.components_.shape[0])
            ny.normalization_ = np.eye(ny.components_.shape[0])
            ny._n_features_out = ny.components_.shape[0]
    linear = pipe.named_steps["linear"]
    linear.coef_ = np.concatenate([basis_weights, weights[p_basis:]])
    linear.intercept_ = float(model.intercept)
    linear.n_features_in_ = linear.coef_.size
    linear.rank_ = linear.coef_.size
    linear.singular_ = np.ones(linear.coef_.size)

    want = model.predict({c: probe[c].to_numpy() for c in features + cats})
    got = pipe.predict(probe)
    scale = max(1.0, float(np.max(np.abs(want))))
    err = float(np.max(np.abs(got - want))) / scale
    if not np.isfinite(err) or err > SKLEARN_TOLERANCE:
        raise InvalidData(
            f"the scikit-learn form of this model disagrees with it by {err:.2e} (relative) on probe rows, more than "
            f"{SKLEARN_TOLERANCE:g}; export it with format=json instead",
            errors=[{"field": "format", "value": "sklearn", "message": "cannot reproduce this model"}])
    return pipe


def _probe_frame(model: FittedModel, pd) -> Any:
    """Rows spread over each numeric input's training range, cycling through every category level."""
    n = max(8, max((len(lv) for lv in model.categories.levels), default=0))
    data: dict[str, Any] = {}
    t = np.linspace(0.0, 1.0, n)
    for i, f in enumerate(model.features):
        lo, hi = model.ranges.get(f, [float(model.scaler.mean[i]) - 1.0, float(model.scaler.mean[i]) + 1.0])
        data[f] = lo + (hi - lo) * np.roll(t, i)
    for name, lv in zip(model.categories.names, model.categories.levels):
        data[name] = np.array([lv[i % len(lv)] for i in range(n)], dtype=object)
    return pd.DataFrame(data)
