"""Continued training over HTTP (``continue_from``, ``old_weight``): the served version equals the engine's
continuation on the same rows (the engine is checked against training from scratch and scikit-learn's Ridge
in tests/engine/test_continued.py), its lineage names the parent, and the refusals are RFC 9457 problems
that say why and what to do."""

from __future__ import annotations

import httpx
import numpy as np

from service.client import Client
from service.engine import tune
from service.engine.continued import continue_tune

HASH_SPEC_CV = {"scheme": "kfold", "folds": 5, "seed": 7, "assignment": "hash"}


def test_a_continuation_serves_the_engines_continued_model(worker_service, kit):
    base, _, _ = worker_service
    tk = Client(base)
    spec = {**kit.SPEC, "cv": HASH_SPEC_CV}
    old, new = kit.pump_table(400, seed=71), kit.pump_table(120, seed=72)
    job = tk.wait(tk.train("pump-cont", rows=kit.as_rows(old), spec=spec, promote="always"), timeout=300)
    assert job["state"] == "succeeded", job
    v1 = tk.version("pump-cont", 1)
    assert v1["continuation"]["folds"] == 5 and v1["continuation"]["bytes"] > 0
    job = tk.wait(tk.train("pump-cont", rows=kit.as_rows(new), continue_from=1, old_weight=0.8, promote="always"),
                  timeout=300)
    assert job["state"] == "succeeded", job
    v2 = tk.version("pump-cont", 2)
    lineage = v2["lineage"]
    assert lineage["parent_version"] == 1 and lineage["old_weight"] == 0.8
    assert lineage["new_rows"] == 120 and lineage["rows"] == 520
    assert lineage["new_data_fingerprint"] == v2["data_fingerprint"]["sha256"]
    assert v2["spec"] == v1["spec"]
    # the engine's own continuation of the same parent on the same rows
    parent = tune({k: v.copy() for k, v in old.items()}, spec)
    body, arrays = parent.to_artifact()
    ref = continue_tune(body, arrays, {k: v.copy() for k, v in new.items()}, old_weight=0.8)
    assert v2["chosen"]["mean"] == ref.chosen["mean"]
    q = kit.pump_table(30, seed=73)
    rows = {k: q[k].tolist() for k in ("flow_lps", "head_m")}
    got = np.array([p["value"] for p in tk.predict("pump-cont", columns=rows)["predictions"]])
    np.testing.assert_allclose(got, ref.model.predict(rows), rtol=1e-12, atol=1e-12)


def test_refusals_are_problems_that_say_why(worker_service, kit):
    base, _, _ = worker_service
    tk = Client(base)
    old = kit.pump_table(200, seed=74)
    # a shuffled kfold version (the in-memory default) cannot take new rows
    job = tk.wait(tk.train("pump-shuffled", rows=kit.as_rows(old), spec=kit.SPEC, promote="always"), timeout=300)
    assert job["state"] == "succeeded", job
    url = f"{base}/v1/models/pump-shuffled/trainings"
    new = kit.as_rows(kit.pump_table(20, seed=75))
    r = httpx.post(url, json={"data": {"rows": new}, "continue_from": 1}, timeout=60)
    assert r.status_code == 422, r.text
    p = r.json()
    assert p["type"] == "/problems/cannot-continue"
    assert "shuffle" in p["detail"] and "cv.assignment 'hash'" in p["detail"]
    assert r.headers["content-type"].startswith("application/problem+json")
    # a missing version is 404; a spec beside continue_from and old_weight alone are request errors
    r = httpx.post(url, json={"data": {"rows": new}, "continue_from": 9}, timeout=60)
    assert r.status_code == 404, r.text
    r = httpx.post(url, json={"data": {"rows": new}, "continue_from": 1, "spec": kit.SPEC}, timeout=60)
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "spec", r.text
    r = httpx.post(url, json={"data": {"rows": new}, "old_weight": 0.5}, timeout=60)
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "old_weight", r.text
    r = httpx.post(url, json={"data": {"rows": new}, "continue_from": 1, "old_weight": 1.5}, timeout=60)
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "old_weight", r.text
    # another column set for a continuable version
    spec = {**kit.SPEC, "cv": HASH_SPEC_CV}
    job = tk.wait(tk.train("pump-cols", rows=kit.as_rows(old), spec=spec, promote="always"), timeout=300)
    assert job["state"] == "succeeded", job
    other = kit.pump_table(20, seed=76)
    other["speed_rpm"] = np.full(20, 1450.0)
    del other["head_m"]
    r = httpx.post(f"{base}/v1/models/pump-cols/trainings", json={"data": {"rows": kit.as_rows(other)},
                                                                  "continue_from": 1}, timeout=60)
    assert r.status_code == 422, r.text
    assert r.json()["type"] == "/problems/cannot-continue" and "head_m" in r.json()["detail"]


def test_a_large_continuation_body_read_by_an_intake_process(tmp_path, kit):
    # intake_process_bytes=0: every JSON body is parsed and staged in an intake process, whose summary
    # must carry continue_from and old_weight back to the route
    with kit.service(tmp_path / "svc", worker=True, intake_process_bytes=0) as (base, _, _):
        tk = Client(base)
        spec = {**kit.SPEC, "cv": HASH_SPEC_CV}
        job = tk.wait(tk.train("pump-big", rows=kit.as_rows(kit.pump_table(300, seed=77)), spec=spec,
                               promote="always"), timeout=300)
        assert job["state"] == "succeeded", job
        job = tk.wait(tk.train("pump-big", rows=kit.as_rows(kit.pump_table(50, seed=78)), continue_from=1,
                               old_weight=0.5, promote="never"), timeout=300)
        assert job["state"] == "succeeded", job
        assert tk.version("pump-big", 2)["lineage"] == {**tk.version("pump-big", 2)["lineage"], "parent_version": 1,
                                                         "old_weight": 0.5, "new_rows": 50, "rows": 350}
        # a retrain reusing the live spec takes the same path (it failed with "the spec must be a JSON object")
        job = tk.wait(tk.train("pump-big", rows=kit.as_rows(kit.pump_table(300, seed=80)), promote="never"),
                      timeout=300)
        assert job["state"] == "succeeded", job
        other = kit.pump_table(20, seed=79)
        del other["head_m"]
        r = httpx.post(f"{base}/v1/models/pump-big/trainings", json={"data": {"rows": kit.as_rows(other)},
                                                                     "continue_from": 2}, timeout=60)
        assert r.status_code == 422 and r.json()["type"] == "/problems/cannot-continue", r.text


def test_a_parent_deleted_before_the_job_runs_fails_the_job_with_a_problem(tmp_path, kit):
    from service.worker import Worker

    with kit.service(tmp_path / "svc", worker=False) as (base, store, settings):
        tk = Client(base)
        spec = {**kit.SPEC, "cv": HASH_SPEC_CV}
        worker = Worker(settings, store)
        tk.train("pump-gone", rows=kit.as_rows(kit.pump_table(200, seed=81)), spec=spec, promote="never")
        assert worker.run_once()
        job = tk.train("pump-gone", rows=kit.as_rows(kit.pump_table(30, seed=82)), continue_from=1)
        r = httpx.delete(f"{base}/v1/models/pump-gone/versions/1", timeout=60)  # not live: it may go
        assert r.status_code == 204, r.text
        assert worker.run_once()
        job = tk.training(job["id"])
        assert job["state"] == "failed" and job["version"] is None
        assert job["problem"]["type"] == "/problems/not-found" and "version 1" in job["problem"]["detail"]
        assert [v["version"] for v in tk.model("pump-gone")["versions"]] == []  # nothing was published
