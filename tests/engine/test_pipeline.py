"""One pipeline behind both front ends: one metric function, one fingerprint, one column-type rule.

References: scikit-learn's metric functions (root_mean_squared_error, mean_absolute_error, r2_score)
as an independent implementation; the diabetes data that ships with scikit-learn (Efron et al., 2004),
written to Parquet here; the in-memory engine as the reference for the streamed one.
"""

from __future__ import annotations

import ast
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sklearn.datasets import load_diabetes
from sklearn.metrics import mean_absolute_error, r2_score, root_mean_squared_error

import service.engine.streaming as streaming
from service.engine import tune
from service.engine.result import metric_of_rows, metric_value
from service.engine.streaming import tune_partitions
from service.errors import InvalidData
from service.sources import open_source
from service.worker import score_on


def data(n=None):
    X, y = load_diabetes(return_X_y=True)  # ships with scikit-learn (Efron et al., 2004)
    d = {f"x{j}": X[:n, j] for j in range(4)}
    d["sex"] = np.where(X[:n, 1] > 0, "f", "m")
    d["y"] = y[:n]
    return d


SPEC = {"target": "y", "features": ["x0", "x2", "x3"], "categorical": ["sex"], "bases": [{"kind": "linear"}],
        "penalty": {"strengths": [0.1, 10.0]}, "cv": {"folds": 4, "seed": 2, "assignment": "hash"},
        "execution": {"batch_rows": 256}}


def write(tmp_path, d, files, name):
    folder = tmp_path / name
    folder.mkdir()
    cuts = np.linspace(0, len(d["y"]), files + 1).astype(int)
    for i in range(files):
        pq.write_table(pa.table({k: v[cuts[i]:cuts[i + 1]] for k, v in d.items()}), folder / f"p{i}.parquet",
                       row_group_size=97)
    return open_source(folder)


def test_one_metric_function_equals_scikit_learn_and_has_no_fallback():
    rng = np.random.default_rng(0)
    y, p = rng.normal(size=50), rng.normal(size=50)
    # scikit-learn's scorers as the independent reference
    assert metric_of_rows("rmse", y, p) == pytest.approx(root_mean_squared_error(y, p), rel=1e-12)
    assert metric_of_rows("mae", y, p) == pytest.approx(mean_absolute_error(y, p), rel=1e-12)
    assert metric_of_rows("r2", y, p) == pytest.approx(r2_score(y, p), rel=1e-12)
    with pytest.raises(ValueError, match="unknown metric 'mape'"):
        metric_value("mape", 3, sse=1.0)

    class Fixed:  # a model that predicts p
        def predict(self, inputs):
            return p

    # the worker's if_better comparison uses the same function: an unknown metric is an error, not RMSE
    assert score_on(Fixed(), {"y": y}, "y", "mae", None) == pytest.approx(mean_absolute_error(y, p), rel=1e-12)
    with pytest.raises(ValueError):
        score_on(Fixed(), {"y": y}, "y", "mape", None)


def test_fingerprint_is_the_same_in_memory_and_streamed_and_follows_the_rows(tmp_path):
    d = data()
    mem = tune(d, SPEC).fingerprint
    schema, parts = write(tmp_path, d, 3, "three")
    streamed = tune_partitions(parts, schema, SPEC).fingerprint
    schema1, parts1 = write(tmp_path, d, 1, "one")
    single = tune_partitions(parts1, schema1, SPEC).fingerprint
    assert mem["sha256"] == streamed["sha256"] == single["sha256"]
    assert mem["rows"] == streamed["rows"] == 442 and mem["columns"] == streamed["columns"] == 5
    swapped = {k: v.copy() for k, v in d.items()}
    swapped["y"][[0, 1]] = swapped["y"][[1, 0]]  # same values, two rows exchanged
    assert tune(swapped, SPEC).fingerprint["sha256"] != mem["sha256"]


def test_booleans_follow_one_rule_in_memory_and_streamed(tmp_path):
    d = data()
    d["alarm"] = d["x0"] > 0
    spec = {k: v for k, v in SPEC.items() if k != "features"}
    # not a default feature in either front end (common practice: true/false is not a measurement)
    assert tune(d, spec).model.features == ["x0", "x1", "x2", "x3"]
    schema, parts = write(tmp_path, d, 2, "bools")
    assert tune_partitions(parts, schema, spec).model.features == ["x0", "x1", "x2", "x3"]
    named = {**SPEC, "features": ["x0", "alarm"]}
    with pytest.raises(InvalidData, match=r"'alarm' holds true/false values.*categorical"):
        tune(d, named)
    with pytest.raises(InvalidData, match=r"'alarm' holds true/false values.*categorical"):
        tune_partitions(parts, schema, named)
    assert tune(d, {**SPEC, "categorical": ["sex", "alarm"]}).model.categories.levels[1] == ["false", "true"]  # the JSON and CSV spelling, on every path


def test_streaming_imports_no_private_helper_of_tune():
    tree = ast.parse(Path(streaming.__file__).read_text())
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.endswith("tune"):
            private = [a.name for a in node.names if a.name.startswith("_")]
            assert not private, private


def test_both_front_ends_give_the_same_table_complexity_and_choice(tmp_path):
    d = data()
    spec = {**SPEC, "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2]}],
            "penalty": {"kind": "elastic_net", "strengths": [0.05, 0.5, 5.0], "l1_ratios": [0.5, 1.0]},
            "selection": {"rule": "one_standard_error"}}
    mem = tune(d, spec)
    schema, parts = write(tmp_path, d, 3, "enet")
    streamed = tune_partitions(parts, schema, spec)
    assert len(mem.cv_table) == len(streamed.cv_table) == 12
    for a, b in zip(mem.cv_table, streamed.cv_table):
        # the in-memory engine is the reference (itself checked against scikit-learn in test_reference.py)
        assert (a["basis"], a["strength"], a["l1_ratio"], a["df"]) == (b["basis"], b["strength"], b["l1_ratio"], b["df"])
        np.testing.assert_allclose(b["split_values"], a["split_values"], rtol=1e-9)
        assert b["se"] == pytest.approx(a["se"], rel=1e-8)
    assert mem.chosen == streamed.chosen | {"mean": mem.chosen["mean"], "std": mem.chosen["std"], "se": mem.chosen["se"]}
    assert mem.fingerprint == streamed.fingerprint
