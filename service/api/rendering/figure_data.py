"""The numbers each figure plots, as JSON: the twin of every figure route for dashboards that draw their
own charts (``Accept: application/json`` on ``.../plots/cv``, ``/path``, ``/residuals`` and
``/models/{name}/plots/history``).

Every series is exactly what the figure draws, from the same stored version; ``±`` is one standard
error of the mean over the CV splits (std/√splits), as on the figures and pages. Non-finite numbers
become null.
"""

from __future__ import annotations

import math
from typing import Any, Iterable, Sequence

import numpy as np

from service.api.rendering import figures as plots

SE_NOTE = ("se: the one-standard-error rule's standard error over the CV splits (sample standard deviation "
           "of the split errors / sqrt(splits))")


def _num(values: Any) -> list[float | None]:
    return [float(v) if v is not None and math.isfinite(float(v)) else None for v in np.asarray(values, dtype=float).tolist()]


def cv_data(name: str, version: int, body: dict[str, Any]) -> dict[str, Any]:
    chosen = body.get("chosen") or {}
    return {
        "figure": "cv", "name": name, "version": version, "metric": chosen.get("metric"),
        "x": "penalty strength (log scale)", "y": f"CV {chosen['metric'].upper()}" if chosen.get("metric") else "CV error", "note": SE_NOTE,
        "chosen": {"basis": chosen.get("basis"), "penalty": chosen.get("penalty"), "mean": chosen.get("mean"),
                   "rule": chosen.get("rule")},
        "series": [{"label": s["label"], "basis": s["basis"], "l1_ratio": s["l1_ratio"],
                    "strengths": _num(s["strengths"]), "mean": _num(s["mean"]), "se": _num(s["se"])}
                   for s in plots.cv_series(body)],
    }


def path_data(name: str, version: int, body: dict[str, Any], strengths: np.ndarray, coefficients: np.ndarray,
              df: np.ndarray | None = None) -> dict[str, Any]:
    path = body.get("path") or {}
    coefficients = np.asarray(coefficients, dtype=float)
    terms = list(path.get("terms") or [f"term {j}" for j in range(coefficients.shape[1])])
    order = np.argsort(np.asarray(strengths, dtype=float))
    return {
        "figure": "path", "name": name, "version": version,
        "x": "penalty strength (log scale)", "y": "coefficient of the standardized term",
        "chosen_strength": path.get("chosen_strength"),
        "strengths": _num(np.asarray(strengths, dtype=float)[order]),
        "series": [{"term": t, "coefficients": _num(coefficients[order, j])} for j, t in enumerate(terms)],
        "df": _num(np.asarray(df, dtype=float)[order]) if df is not None else None,
    }


def residuals_data(name: str, version: int, body: dict[str, Any], predicted: np.ndarray,
                   observed: np.ndarray) -> dict[str, Any]:
    predicted = np.asarray(predicted, dtype=float)
    observed = np.asarray(observed, dtype=float)
    ok = np.isfinite(predicted) & np.isfinite(observed)
    target = (body.get("spec") or {}).get("target")
    return {
        "figure": "residuals", "name": name, "version": version, "target": target,
        "x": "out-of-fold prediction", "y": "observed", "rows": int(ok.sum()),
        "predicted": _num(predicted[ok]), "observed": _num(observed[ok]),
        "residual": _num(observed[ok] - predicted[ok]),
    }


def history_data(name: str, versions: Sequence[dict[str, Any]], live: int | None,
                 promoted: Iterable[int]) -> dict[str, Any]:
    promoted = set(promoted)
    points = []
    for v in versions:
        summary = v.get("summary") or {}
        chosen = summary.get("chosen") or {}
        splits = (summary.get("cv_summary") or {}).get("splits") or 1
        mean = chosen.get("mean")
        points.append({
            "version": int(v["version"]), "created_at": v.get("created_at"), "metric": chosen.get("metric"),
            "mean": mean, "se": plots.chosen_se(chosen, splits),
            "splits": splits, "strength": (chosen.get("penalty") or {}).get("strength"),
            "basis": chosen.get("basis"), "basis_label": plots.basis_label(chosen.get("basis")),
            "live": int(v["version"]) == live, "was_live": int(v["version"]) in promoted or int(v["version"]) == live,
        })
    return {"figure": "history", "name": name, "live_version": live, "note": SE_NOTE,
            "x": "version created (UTC)", "y": "CV error of the chosen point; chosen penalty strength",
            "points": points}
