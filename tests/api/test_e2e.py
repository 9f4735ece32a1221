"""End to end through a real uvicorn server on a loopback port with httpx, with the embedded worker.

Train -> poll -> metadata -> predict; idempotent retry; if_better; cancel; CV+ coverage; warnings;
a predict during a live switch never mixes versions.
"""

from __future__ import annotations

import copy
import threading

import httpx
import numpy as np
import pytest

from service.engine import tune


def submit(base, name, body, **kw):
    return httpx.post(f"{base}/v1/models/{name}/trainings", json=body, timeout=60, **kw)


def test_train_poll_metadata_predict_matches_engine(worker_service, kit):
    base, store, _ = worker_service
    cols = kit.pump_table(300, seed=1)
    r = submit(base, "pump-a", {"data": {"rows": kit.as_rows(cols)}, "spec": kit.SPEC, "promote": "always"})
    assert r.status_code == 202, r.text
    job = r.json()
    assert r.headers["location"] == f"/v1/trainings/{job['id']}"
    assert job["state"] in ("queued", "running")
    done = kit.wait_job(base, job["id"])
    assert done["state"] == "succeeded", done
    assert done["version"] == 1
    assert done["progress"]["total"] and done["progress"]["done"] == done["progress"]["total"]
    assert done["decision"]["went_live"] is True

    meta = httpx.get(f"{base}/v1/models/pump-a/versions/1").json()
    assert meta["spec"]["target"] == "energy_kwh" and meta["spec"]["cv"]["seed"] == 7
    schema = {f["name"]: f for f in meta["feature_schema"]}
    assert schema["flow_lps"]["range"] == [float(cols["flow_lps"].min()), float(cols["flow_lps"].max())]
    assert meta["data_fingerprint"] and meta["libraries"]["numpy"] and meta["created_at"]
    assert meta["live"] is True

    # The same data and spec through the engine directly (the reference the issue names).
    reference = tune({k: v.copy() for k, v in cols.items()}, copy.deepcopy(kit.SPEC))
    assert meta["chosen"]["basis"] == reference.chosen["basis"]
    fresh = kit.pump_table(50, seed=99)
    inputs = {k: fresh[k] for k in ("flow_lps", "head_m")}
    expected = reference.model.predict(inputs)
    p = httpx.post(f"{base}/v1/models/pump-a/predictions", json={"rows": kit.as_rows(inputs)})
    assert p.status_code == 200, p.text
    body = p.json()
    got = np.array([row["value"] for row in body["predictions"]])
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-12)
    assert body["model"]["name"] == "pump-a" and body["model"]["version"] == 1
    assert body["model"]["basis"] == reference.chosen["basis"]
    assert body["model"]["penalty"]["strength"] == reference.chosen["penalty"]["strength"]
    assert body["model"]["cv"] == {"metric": "rmse", "mean": reference.summary["mean"], "splits": 5}
    assert body["model"]["created_at"] == meta["created_at"]

    # CSV in, CSV out gives the same numbers (written as shortest round-trip decimals).
    text = "flow_lps,head_m\n" + "\n".join(f"{float(a)!r},{float(b)!r}" for a, b in zip(inputs["flow_lps"], inputs["head_m"]))
    c = httpx.post(f"{base}/v1/models/pump-a/versions/1/predictions", content=text, headers={"content-type": "text/csv"})
    assert c.status_code == 200 and c.headers["content-type"].startswith("text/csv")
    assert c.headers["tikhon-model-version"] == "1"
    lines = c.text.strip().split("\n")
    assert lines[0] == "value,warnings"
    np.testing.assert_allclose([float(x.split(",")[0]) for x in lines[1:]], expected, rtol=1e-12, atol=1e-12)

    cv = httpx.get(f"{base}/v1/models/pump-a/versions/1/cv?view=all").json()
    assert len(cv["table"]) == len(reference.cv_table)
    path = httpx.get(f"{base}/v1/models/pump-a/versions/1/path").json()["path"]
    assert len(path["strengths"]) == len(path["coefficients"]) and isinstance(path["strengths"][0], float)


def test_idempotent_retry_returns_first_job(worker_service, kit):
    base, store, _ = worker_service
    body = {"data": {"rows": kit.as_rows(kit.pump_table(120, seed=2))}, "spec": kit.SPEC, "promote": "never"}
    first = submit(base, "pump-idem", body, headers={"Idempotency-Key": "nightly-2024-06-01"})
    again = submit(base, "pump-idem", body, headers={"Idempotency-Key": "nightly-2024-06-01"})
    assert first.status_code == again.status_code == 202
    assert again.json()["id"] == first.json()["id"]
    assert again.headers.get("tikhon-replayed") == "true" and "idempotent-replay" not in again.headers
    assert "tikhon-replayed" not in first.headers  # only the repeat says it is one
    assert [j["id"] for j in store.jobs.list(name="pump-idem")] == [first.json()["id"]]
    # The same key with a different request is refused, not silently mapped to the first job.
    other = dict(body, promote="always")
    clash = submit(base, "pump-idem", other, headers={"Idempotency-Key": "nightly-2024-06-01"})
    assert clash.status_code == 409 and clash.headers["content-type"] == "application/problem+json"
    assert kit.wait_job(base, first.json()["id"])["state"] == "succeeded"
    assert len(store.list_versions("pump-idem")) == 1


def test_if_better_promotes_better_and_refuses_worse(worker_service, kit):
    base, store, _ = worker_service
    # A deliberately poor first version: a linear basis with a strength so large it predicts about the mean.
    poor = {"target": "energy_kwh", "bases": [{"kind": "linear"}], "penalty": {"kind": "l2", "strengths": [1e6]}}
    j1 = submit(base, "pump-gate", {"data": {"rows": kit.as_rows(kit.pump_table(200, seed=3))}, "spec": poor,
                                    "promote": "always"}).json()
    assert kit.wait_job(base, j1["id"])["version"] == 1

    good_rows = kit.as_rows(kit.pump_table(200, seed=4))
    j2 = kit.wait_job(base, submit(base, "pump-gate", {"data": {"rows": good_rows}, "spec": kit.SPEC,
                                                       "promote": "if_better"}).json()["id"])
    d2 = j2["decision"]
    assert j2["state"] == "succeeded" and j2["version"] == 2 and d2["went_live"] is True
    assert d2["new_cv_mean"] < d2["live_on_new_data"] and d2["live_version"] == 1
    assert store.live_version("pump-gate") == 2

    j3 = kit.wait_job(base, submit(base, "pump-gate", {"data": {"rows": good_rows}, "spec": poor,
                                                       "promote": "if_better"}).json()["id"])
    d3 = j3["decision"]
    assert j3["state"] == "succeeded" and j3["version"] == 3
    assert d3["went_live"] is False and d3["new_cv_mean"] > d3["live_on_new_data"]
    assert store.live_version("pump-gate") == 2  # the worse model did not go live

    # A spec-less retrain reuses the live version's spec; min_improvement can hold back a small gain.
    j4 = kit.wait_job(base, submit(base, "pump-gate", {"data": {"rows": kit.as_rows(kit.pump_table(200, seed=5))},
                                                       "promote": "if_better", "min_improvement": 1e3}).json()["id"])
    assert j4["state"] == "succeeded" and j4["decision"]["went_live"] is False
    assert httpx.get(f"{base}/v1/models/pump-gate/versions/{j4['version']}").json()["spec"]["bases"] == \
        httpx.get(f"{base}/v1/models/pump-gate/versions/2").json()["spec"]["bases"]

    hist = httpx.get(f"{base}/v1/models/pump-gate/history").json()["history"]
    # Every decision is in the history: the two refused retrains keep version 2 live and say why.
    assert [(h["from_version"], h["to_version"], h["version"], h["went_live"]) for h in hist] == [
        (None, 1, 1, True), (1, 2, 2, True), (2, 2, 3, False), (2, 2, j4["version"], False)]
    assert hist[2]["decision"] == "not made live" and hist[2]["details"]["new_cv_mean"] == d3["new_cv_mean"]
    assert "does not beat" in hist[3]["reason"] and hist[3]["details"]["job_id"] == j4["id"]
    assert hist[1]["details"]["new_cv_mean"] == d2["new_cv_mean"]
    assert hist[1]["details"]["live_on_new_data"] == d2["live_on_new_data"]


def test_cancel_running_job(worker_service, kit):
    base, store, _ = worker_service
    cols = kit.pump_table(6000, seed=6)
    slow = {"target": "energy_kwh", "bases": [{"kind": "rbf", "widths": [0.05 * (i + 1) for i in range(150)],
                                                "centers": 400}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e3, "count": 5}}}
    job = submit(base, "pump-cancel", {"data": {"rows": kit.as_rows(cols)}, "spec": slow}).json()
    import time

    while True:  # wait until the worker has started it and reported progress
        state = httpx.get(f"{base}/v1/trainings/{job['id']}").json()
        if state["state"] != "queued" and state["progress"]["total"]:
            break
        assert state["state"] in ("queued", "running"), state
        time.sleep(0.05)
    r = httpx.delete(f"{base}/v1/trainings/{job['id']}")
    assert r.status_code == 200 and r.json()["state"] == "cancelled"
    end = kit.wait_job(base, job["id"])
    assert end["state"] == "cancelled" and end["version"] is None
    assert end["progress"]["done"] < end["progress"]["total"]
    # Cancelling again: it is already cancelled (idempotent); a finished job cannot be cancelled.
    assert httpx.delete(f"{base}/v1/trainings/{job['id']}").json()["state"] == "cancelled"
    with pytest.raises(Exception):
        store.list_versions("pump-cancel")  # nothing was published: the model does not exist


def test_cv_plus_coverage_and_warnings(worker_service, kit):
    base, _, _ = worker_service
    # CV+ (Barber, Candès, Ramdas & Tibshirani, "Predictive inference with the jackknife+", Annals of
    # Statistics 2021): coverage >= 1 - 2*alpha in the worst case and about 1 - alpha in practice. With a
    # correctly specified model and Gaussian noise the empirical coverage of 2,000 fresh rows at 0.9
    # should sit near 0.9; [0.87, 0.95] allows for the binomial spread of 2,000 draws (sd ~ 0.0067)
    # and the finite-sample inflation of the (n+1) quantile.
    train = kit.pump_table(400, seed=11, noise=2.0)
    job = submit(base, "pump-cover", {"data": {"rows": kit.as_rows(train)}, "spec": kit.SPEC, "promote": "always"}).json()
    assert kit.wait_job(base, job["id"])["state"] == "succeeded"
    fresh = kit.pump_table(2000, seed=12, noise=2.0)
    rows = kit.as_rows({k: fresh[k] for k in ("flow_lps", "head_m")})
    r = httpx.post(f"{base}/v1/models/pump-cover/predictions", json={"rows": rows, "interval_level": 0.9}, timeout=60)
    assert r.status_code == 200, r.text
    preds = r.json()["predictions"]
    lo = np.array([p["interval"][0] for p in preds])
    hi = np.array([p["interval"][1] for p in preds])
    y = fresh["energy_kwh"]
    coverage = float(np.mean((lo <= y) & (y <= hi)))
    assert 0.87 <= coverage <= 0.95, coverage
    # Range warnings appear exactly for the fresh rows outside the training ranges.
    outside = ((fresh["flow_lps"] < train["flow_lps"].min()) | (fresh["flow_lps"] > train["flow_lps"].max())
               | (fresh["head_m"] < train["head_m"].min()) | (fresh["head_m"] > train["head_m"].max()))
    flagged = np.array([any("training range" in w for w in p["warnings"]) for p in preds])
    assert np.array_equal(flagged, outside)

    out = httpx.post(f"{base}/v1/models/pump-cover/predictions",
                     json={"rows": [{"flow_lps": 140.0, "head_m": 30.0}], "interval_level": 0.9}).json()
    warnings = out["predictions"][0]["warnings"]
    hi_flow = float(train["flow_lps"].max())
    assert any(w.startswith("flow_lps=140 is above the training range") and f"{hi_flow:.6g}" in w for w in warnings)


def test_live_switch_never_mixes_versions(worker_service, kit):
    base, store, _ = worker_service
    rows = kit.as_rows(kit.pump_table(150, seed=21))
    j1 = kit.wait_job(base, submit(base, "pump-flip", {"data": {"rows": rows}, "spec": kit.SPEC, "promote": "always"}).json()["id"])
    poor = {"target": "energy_kwh", "bases": [{"kind": "linear"}], "penalty": {"kind": "l2", "strengths": [1e4]}}
    j2 = kit.wait_job(base, submit(base, "pump-flip", {"data": {"rows": rows}, "spec": poor, "promote": "never"}).json()["id"])
    assert (j1["version"], j2["version"]) == (1, 2)
    probe = {"rows": kit.as_rows({k: v[:5] for k, v in kit.pump_table(5, seed=22).items() if k != "energy_kwh"})}
    expected = {}
    for v in (1, 2):
        body = httpx.post(f"{base}/v1/models/pump-flip/versions/{v}/predictions", json=probe).json()
        expected[v] = [p["value"] for p in body["predictions"]]
    assert expected[1] != expected[2]

    seen: list[tuple[int, list[float]]] = []
    stop = threading.Event()
    errors: list[str] = []

    def hammer():
        with httpx.Client(base_url=base) as c:
            while not stop.is_set():
                r = c.post("/v1/models/pump-flip/predictions", json=probe)
                if r.status_code != 200:
                    errors.append(r.text)
                    continue
                b = r.json()
                seen.append((b["model"]["version"], [p["value"] for p in b["predictions"]]))

    threads = [threading.Thread(target=hammer) for _ in range(3)]
    for t in threads:
        t.start()
    try:
        with httpx.Client(base_url=base) as c:
            for i in range(30):
                v = 2 if i % 2 == 0 else 1
                assert c.put("/v1/models/pump-flip/live", json={"version": v, "reason": f"flip {i}"}).status_code == 200
                b = c.post("/v1/models/pump-flip/predictions", json=probe).json()
                assert b["model"]["version"] == v  # a change made through this server is seen at once
                seen.append((v, [p["value"] for p in b["predictions"]]))
    finally:
        stop.set()
        for t in threads:
            t.join()
    assert not errors
    assert {v for v, _ in seen} == {1, 2}
    for v, values in seen:
        assert values == expected[v]
    # v1 going live, v2's 'never' decision (kept v1 live) and the 30 flips
    hist = httpx.get(f"{base}/v1/models/pump-flip/history").json()["history"]
    assert len(hist) == 32 and [h["went_live"] for h in hist[:2]] == [True, False]


def test_metrics_and_request_ids(worker_service, kit):
    base, store, _ = worker_service
    rows = kit.as_rows(kit.pump_table(120, seed=41))
    job = kit.wait_job(base, submit(base, "pump-metrics", {"data": {"rows": rows}, "spec": kit.SPEC, "promote": "always"}).json()["id"])
    probe = {"rows": [{"flow_lps": 50.0, "head_m": 30.0}] * 3}
    for _ in range(4):
        r = httpx.post(f"{base}/v1/models/pump-metrics/predictions", json=probe, headers={"X-Request-Id": "probe-1"})
        assert r.headers["x-request-id"] == "probe-1"
    assert len(httpx.get(f"{base}/healthz").headers["x-request-id"]) == 32  # generated when none is sent
    text = httpx.get(f"{base}/metrics").text
    # Prometheus text exposition format (prometheus.io "Exposition formats"): name{labels} value.
    lines = dict(line.rsplit(" ", 1) for line in text.splitlines() if line and not line.startswith("#"))
    key = 'tikhon_http_requests_total{method="POST",route="/v1/models/{name}/predictions",status="200"}'
    assert float(lines[key]) >= 4
    assert float(lines[f'tikhon_predictions_total{{model="pump-metrics",version="{job["version"]}"}}']) == 12
    assert float(lines['tikhon_training_jobs{state="succeeded"}']) >= 1
    assert float(lines["tikhon_model_cache_hits_total"]) >= 3
    assert 'tikhon_http_request_seconds_bucket{le="0.005",method="POST",route="/v1/models/{name}/predictions"}' in lines
