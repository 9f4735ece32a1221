"""The JSON answer of a prediction, spliced from column arrays, read back by an independent JSON parser.

The reference parser is Python's standard ``json`` module (RFC 8259); a float written as the shortest
round-trip text parses back to the same float, so values are compared with ``==``.
"""

from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
import pytest
from sklearn.datasets import load_diabetes

import service.api.predict_io as predictions_module
from service.api.predict_io import json_answer as _json
from service.engine import tune

SERVED = SimpleNamespace(block_json=b'{"name":"m","version":3}')


def expected(detail: dict, with_interval: bool) -> list[dict]:
    def num(v: float):
        return float(v) if np.isfinite(v) else None  # RFC 8259 has no inf/NaN: they are written as null

    out = []
    for i, w in enumerate(detail["warnings"]):
        row = {"value": num(detail["value"][i])}
        if with_interval:
            row["interval"] = [num(detail["lower"][i]), num(detail["upper"][i])]
        row["warnings"] = list(w)
        out.append(row)
    return out


@pytest.mark.parametrize("m", [0, 1, 2, 7, 3000])
@pytest.mark.parametrize("with_interval", [True, False])
def test_json_answer_parses_to_the_rows_in_order(m, with_interval):
    rng = np.random.default_rng(m)
    value = rng.normal(0.0, 1.0, m) * 10.0 ** rng.integers(-30, 30, m)
    lower, upper = value - rng.uniform(0, 5, m), value + rng.uniform(0, 5, m)
    if m > 2:
        lower[1], upper[2], value[0] = -np.inf, np.inf, -0.0  # one-sided intervals; a signed zero
    warnings = [[] for _ in range(m)]
    if m > 3:
        warnings[0] = ['flow="x" is above the training range [1, 2]', "leverage 0.9 exceeds ..."]
        warnings[m - 1] = ["zone=Nörd was not seen in training; its effect is taken as zero"]
    detail = {"value": value, "lower": lower, "upper": upper, "warnings": warnings}
    body = json.loads(_json(SERVED, detail, with_interval))
    assert body["model"] == {"name": "m", "version": 3}
    assert body["predictions"] == expected(detail, with_interval)
    assert len(body["predictions"]) == m
    if m > 2:
        assert str(body["predictions"][0]["value"]) == "-0.0"
        if with_interval:
            assert body["predictions"][1]["interval"][0] is None and body["predictions"][2]["interval"][1] is None


def test_json_answer_of_a_real_model_with_warnings():
    X, y = load_diabetes(return_X_y=True)  # ships with scikit-learn (Efron et al., 2004)
    data = {f"x{j}": X[:, j] for j in range(3)} | {"y": y}
    model = tune(data, {"target": "y", "bases": [{"kind": "polynomial", "degrees": [2]}],
                        "penalty": {"strengths": [1.0]}, "cv": {"folds": 5, "seed": 1}}).model
    q = {f"x{j}": X[:50, j].copy() for j in range(3)}
    q["x1"][[3, 40]] = [5.0, -5.0]  # far above and below the training range
    detail = model.predict_detail(q, interval_level=0.9)
    assert detail["warnings"][3] and detail["warnings"][40] and not detail["warnings"][0]
    body = json.loads(_json(SERVED, detail, True))
    assert body["predictions"] == expected(detail, True)


@pytest.mark.parametrize("with_interval", [True, False])
def test_few_rows_are_written_byte_for_byte_as_the_spliced_columns(with_interval, monkeypatch):
    # Up to SMALL_JSON_ROWS rows are written from Python floats and lists; the bytes must be those of the
    # column splice (orjson writes a numpy float64 and the equal Python float alike; common practice: compare
    # the two writers on values across the whole exponent range, signed zeros, infinities and NaN).
    rng = np.random.default_rng(21)
    for m in range(1, predictions_module.SMALL_JSON_ROWS + 1):
        value = rng.normal(0.0, 1.0, m) * 10.0 ** rng.integers(-300, 300, m)
        value[0] = [-0.0, np.nan, np.inf, 1e-320, 0.1][m % 5]
        lower, upper = value - rng.uniform(0, 5, m), value + rng.uniform(0, 5, m)
        warnings = [[] if i % 3 else [f"row {i}: leverage 0.9 exceeds \"0.5\"", "zone=Nörd was not seen"] for i in range(m)]
        detail = {"value": value, "lower": lower, "upper": upper, "warnings": warnings}
        small = _json(SERVED, detail, with_interval)
        monkeypatch.setattr(predictions_module, "SMALL_JSON_ROWS", 0)
        spliced = _json(SERVED, detail, with_interval)
        monkeypatch.undo()
        assert small == spliced, m
        assert json.loads(small)["predictions"] == expected(detail, with_interval)
