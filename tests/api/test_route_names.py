"""Names of our own: predictions are a noun resource like trainings, the replay header carries the
project's prefix, one word for the newest version and one label for the CV error.

``POST /v1/models/{name}/predictions`` and ``/versions/{v}/predictions`` answer; the verb paths that
came before (``/predict``) are gone, with no alias (404 or 405 problem details)."""

from __future__ import annotations

import httpx
import numpy as np
import pytest

from service.client import Client
from service.engine import tune

NAME = "pump-names"
LIVE = f"/v1/models/{NAME}/predictions"
PINNED = f"/v1/models/{NAME}/versions/1/predictions"
ROWS = [{"flow_lps": 42.5, "head_m": 31.0}, {"flow_lps": 400.0, "head_m": 35.0}]


@pytest.fixture(scope="module")
def named(tmp_path_factory, kit):
    with kit.service(tmp_path_factory.mktemp("names"), worker=False) as (base, store, settings):
        result = tune(kit.pump_table(150, seed=41), kit.SPEC)
        body, arrays = result.to_artifact()
        store.publish(NAME, body, arrays)
        store.set_live(NAME, 1, actor="test", reason="fixture")
        yield base, store, result


def test_predictions_route_answers_as_the_engine_and_the_verb_path_is_gone(named):
    base, _, result = named
    expected = result.model.predict_detail({k: np.array([r[k] for r in ROWS]) for k in ROWS[0]}, interval_level=0.9)
    for path in (LIVE, PINNED):
        r = httpx.post(f"{base}{path}", json={"rows": ROWS, "interval_level": 0.9}, timeout=60)
        assert r.status_code == 200, r.text
        got = r.json()
        assert got["model"]["version"] == 1
        # the API's numbers are the engine's (its own FittedModel is the reference; common practice)
        np.testing.assert_allclose([p["value"] for p in got["predictions"]], expected["value"], rtol=1e-12, atol=0)
        np.testing.assert_allclose([p["interval"][0] for p in got["predictions"]], expected["lower"], rtol=1e-12)
        np.testing.assert_allclose([p["interval"][1] for p in got["predictions"]], expected["upper"], rtol=1e-12)
        assert [p["warnings"] for p in got["predictions"]] == [list(w) for w in expected["warnings"]]
        assert got["predictions"][1]["warnings"], "a flow of 400 l/s lies far outside the training range"
    for old in (f"/v1/models/{NAME}/predict", f"/v1/models/{NAME}/versions/1/predict"):
        r = httpx.post(f"{base}{old}", json={"rows": ROWS}, timeout=60)
        assert r.status_code in (404, 405), (old, r.status_code, r.text)
        assert r.headers["content-type"] == "application/problem+json"
    # the document lists the new paths and not the old ones
    paths = httpx.get(f"{base}/openapi.json", timeout=60).json()["paths"]
    assert "/v1/models/{name}/predictions" in paths and "/v1/models/{name}/versions/{version}/predictions" in paths
    assert not [p for p in paths if p.endswith("/predict")]


def test_client_links_and_the_newest_version(named):
    base, store, _ = named
    with Client(base) as tk:
        answer = tk.predict(NAME, rows=ROWS[:1])
        assert answer["model"]["version"] == 1 and len(answer["predictions"]) == 1
        model = tk.model(NAME)
        assert model["links"]["predictions"] == LIVE and "predict" not in model["links"]
        assert model["newest_version"] == 1 and "latest_version" not in model
        assert [m["newest_version"] for m in tk.models() if m["name"] == NAME] == [1]
        meta = tk.version(NAME, 1)
        assert meta["links"]["predictions"] == PINNED


def test_a_repeated_submission_says_so_in_the_projects_own_header(named, kit):
    base, _, _ = named
    body = {"data": {"rows": kit.as_rows(kit.pump_table(60, seed=3))}, "spec": kit.SPEC, "promote": "never"}
    headers = {"Idempotency-Key": "names-2026-12-02"}
    first = httpx.post(f"{base}/v1/models/pump-replay/trainings", json=body, headers=headers, timeout=60)
    again = httpx.post(f"{base}/v1/models/pump-replay/trainings", json=body, headers=headers, timeout=60)
    assert first.status_code == again.status_code == 202
    assert again.json()["id"] == first.json()["id"]
    assert again.headers.get("Tikhon-Replayed") == "true" and "Idempotent-Replay" not in again.headers
    assert "Tikhon-Replayed" not in first.headers
    doc = httpx.get(f"{base}/openapi.json", timeout=60).json()
    answer = doc["paths"]["/v1/models/{name}/trainings"]["post"]["responses"]["202"]
    assert "Tikhon-Replayed" in answer["headers"]
