"""Round trip with the real engine (store issue, "Done means"): a model from ``tune`` → publish → load
in a fresh process predicts the same values bit for bit.

Data: the diabetes data set that scikit-learn ships (``sklearn.datasets.load_diabetes``, 442 rows,
10 features), a public reference data set installed with the package, not invented data.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.datasets import load_diabetes

from service.engine import tune
from service.store import Store

SPECS = {
    "linear+poly2": {"target": "y", "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2]}],
                     "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e3, "count": 12}},
                     "cv": {"folds": 5, "seed": 0}},
    "rbf": {"target": "y", "bases": [{"kind": "rbf", "widths": [1.0, 2.0], "centers": 60}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e2, "count": 8}},
            "cv": {"folds": 4, "seed": 1}},
}


@pytest.fixture(scope="module")
def diabetes():
    d = load_diabetes()  # shipped with scikit-learn
    data = {name: d.data[:, i] for i, name in enumerate(d.feature_names)}
    data["y"] = d.target
    return data


@pytest.mark.parametrize("spec_name", sorted(SPECS))
def test_tune_publish_load_in_fresh_process_bit_for_bit(settings, kit, tmp_path, diabetes, spec_name):
    result = tune(diabetes, SPECS[spec_name])
    body, arrays = result.to_artifact()
    with Store(settings) as store:  # the engine's own loader
        row = store.publish("diabetes", body, arrays, job_id="0" * 32)
        assert row["summary"]["chosen"] == json.loads(json.dumps(result.chosen))
        in_process = store.load("diabetes", row["version"])
    # New rows: perturbed training rows, seeded, so the inputs differ from what was fitted.
    rng = np.random.default_rng(42)
    inputs = {k: v + rng.normal(scale=0.01, size=v.shape) for k, v in diabetes.items() if k != "y"}
    np.savez(tmp_path / "inputs.npz", **inputs)
    expected = result.model.predict(inputs)
    assert in_process.model.predict(inputs).tobytes() == expected.tobytes()

    res = kit.run_proc("predict", "--store", str(settings.store), "--url", settings.database_url or "",
                       "--name", "diabetes", "--version", str(row["version"]), "--inputs", str(tmp_path / "inputs.npz"))
    out = json.loads(res.stdout)
    assert out["checksum"] == row["checksum"]
    fresh = np.array([float.fromhex(v) for v in out["predictions"]])
    assert fresh.tobytes() == expected.tobytes()  # bit for bit
    assert np.isfinite(fresh).all() and fresh.std() > 0
