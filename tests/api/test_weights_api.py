"""Row weights through the HTTP API: the served model equals the engine's weighted fit on the same rows
(the engine is checked against scikit-learn's sample_weight in tests/engine/test_weights.py), and bad
weights are refused naming the column."""

from __future__ import annotations

import copy

import httpx
import numpy as np

from service.client import Client
from service.engine import tune


def test_weighted_training_serves_the_engines_weighted_model(worker_service, kit):
    base, _, _ = worker_service
    tk = Client(base)
    cols = kit.pump_table(300, seed=61)
    cols["trust"] = np.random.default_rng(61).uniform(0.0, 4.0, 300)  # e.g. meter quality per reading
    spec = {**kit.SPEC, "weight": "trust"}
    job = tk.wait(tk.train("pump-weighted", rows=kit.as_rows(cols), spec=spec, promote="always"), timeout=300)
    assert job["state"] == "succeeded", job
    meta = tk.version("pump-weighted", 1)
    assert meta["spec"]["weight"] == "trust"
    assert "trust" not in [f["name"] for f in meta["feature_schema"]]  # a weight is never an input
    reference = tune({k: v.copy() for k, v in cols.items()}, copy.deepcopy(spec))
    assert meta["chosen"]["mean"] == reference.chosen["mean"]
    q = kit.pump_table(40, seed=62)
    rows = {k: q[k].tolist() for k in ("flow_lps", "head_m")}
    got = np.array([p["value"] for p in tk.predict("pump-weighted", columns=rows)["predictions"]])
    np.testing.assert_allclose(got, reference.model.predict(rows), rtol=1e-12, atol=1e-12)
    unweighted = tune({k: v.copy() for k, v in cols.items() if k != "trust"}, copy.deepcopy(kit.SPEC))
    assert not np.allclose(got, unweighted.model.predict(rows), rtol=1e-6)  # the weights matter


def test_negative_weights_are_refused_naming_the_column(worker_service, kit):
    base, _, _ = worker_service
    cols = kit.pump_table(120, seed=63)
    cols["trust"] = np.ones(120)
    cols["trust"][5] = -2.0
    r = httpx.post(f"{base}/v1/models/pump-weighted-bad/trainings", timeout=60,
                   json={"data": {"rows": kit.as_rows(cols)}, "spec": {**kit.SPEC, "weight": "trust"}})
    if r.status_code == 202:  # refused when the job reads the rows
        job = kit.wait_job(base, r.json()["id"])
        assert job["state"] == "failed"
        detail = job["problem"]["detail"]
    else:
        assert r.status_code == 422, r.text
        detail = r.json()["detail"]
    assert "'trust'" in detail and "[5]" in detail and "at least 0" in detail
