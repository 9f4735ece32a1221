"""For dashboards: every figure answers its plotted numbers as JSON under ``Accept: application/json``,
and a CORS preflight from an unlisted origin answers a problem that names TIKHON_CORS_ORIGINS."""

from __future__ import annotations

import math
import statistics

import httpx
import numpy as np
import pytest

from service.engine import tune


@pytest.fixture(scope="module")
def dash(tmp_path_factory, kit):
    root = tmp_path_factory.mktemp("dash")
    with kit.service(root, worker=False, cors_origins=["http://dash.localhost:9000"]) as (base, store, settings):
        result = tune(kit.pump_table(120, seed=41), kit.SPEC)
        body, arrays = result.to_artifact()
        store.publish("pump-dash", body, arrays)
        store.set_live("pump-dash", 1, actor="test", reason="fixture")
        store.publish("pump-dash", *tune(kit.pump_table(140, seed=42), kit.SPEC).to_artifact())
        yield base, store, result


J = {"Accept": "application/json"}


def test_cv_figure_json_is_the_cv_table_grouped_by_setting(dash):
    base, _, result = dash
    r = httpx.get(f"{base}/v1/models/pump-dash/versions/1/plots/cv", headers=J)
    assert r.status_code == 200 and r.headers["content-type"] == "application/json"
    data = r.json()
    table = httpx.get(f"{base}/v1/models/pump-dash/versions/1/cv", params={"view": "all"}).json()["table"]
    assert data["figure"] == "cv" and len(data["series"]) == 3  # linear, polynomial 2 and 3 (the spec's grid)
    assert sum(len(s["strengths"]) for s in data["series"]) == len(table)
    for s in data["series"]:
        assert s["strengths"] == sorted(s["strengths"])
        for lam, mean, se in zip(s["strengths"], s["mean"], s["se"]):
            row = next(t for t in table if t["basis"] == s["basis"] and t["strength"] == lam)
            assert mean == row["mean"]
            # one standard error over the 5 folds, the sample standard deviation (ddof=1) over sqrt(5):
            # Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed., section 7.10
            assert math.isclose(se, statistics.stdev(row["split_values"]) / math.sqrt(5), rel_tol=1e-9)
            assert math.isclose(se, row["se"], rel_tol=1e-12)
    assert data["chosen"]["penalty"]["strength"] == result.chosen["penalty"]["strength"]
    # An explicit image format still gets the image.
    img = httpx.get(f"{base}/v1/models/pump-dash/versions/1/plots/cv?format=svg", headers=J, timeout=120)
    assert img.headers["content-type"].startswith("image/svg+xml")
    assert httpx.get(f"{base}/v1/models/pump-dash/versions/1/plots/cv", timeout=120).headers["content-type"].startswith("image/svg")


def test_path_residuals_and_history_json(dash):
    base, store, result = dash
    path = httpx.get(f"{base}/v1/models/pump-dash/versions/1/plots/path", headers=J).json()
    ref = httpx.get(f"{base}/v1/models/pump-dash/versions/1/path").json()["path"]
    order = np.argsort(ref["strengths"])
    assert path["strengths"] == np.asarray(ref["strengths"])[order].tolist()
    assert [s["term"] for s in path["series"]] == ref["terms"]
    coef = np.asarray(ref["coefficients"])
    for j, s in enumerate(path["series"]):
        assert s["coefficients"] == coef[order, j].tolist()
    res = httpx.get(f"{base}/v1/models/pump-dash/versions/1/plots/residuals", headers=J).json()
    assert res["rows"] == 120 and len(res["predicted"]) == 120
    assert np.allclose(np.asarray(res["observed"]) - np.asarray(res["predicted"]), res["residual"], rtol=0, atol=0)
    assert sorted(res["observed"]) == sorted(result.oof_observed.tolist())
    hist = httpx.get(f"{base}/v1/models/pump-dash/plots/history", headers=J).json()
    assert hist["figure"] == "history" and hist["live_version"] == 1
    assert [(p["version"], p["live"], p["was_live"]) for p in hist["points"]] == [(1, True, True), (2, False, False)]
    v2 = store.get_version("pump-dash", 2)["summary"]["chosen"]
    assert hist["points"][1]["mean"] == v2["mean"] and math.isclose(hist["points"][1]["se"], v2["se"])


def test_cors_preflight_from_an_unlisted_origin_names_the_setting(dash):
    base, _, _ = dash
    pre = {"Origin": "http://elsewhere.localhost:8080", "Access-Control-Request-Method": "POST"}
    r = httpx.options(f"{base}/v1/models/pump-dash/predictions", headers=pre)
    assert r.status_code == 403 and r.headers["content-type"] == "application/problem+json"
    body = r.json()
    assert body["type"] == "/problems/cors-origin-not-allowed"
    assert "TIKHON_CORS_ORIGINS" in body["detail"] and "http://elsewhere.localhost:8080" in body["detail"]
    assert "(now: http://dash.localhost:9000)" in body["detail"]
    ok = httpx.options(f"{base}/v1/models/pump-dash/predictions", headers={**pre, "Origin": "http://dash.localhost:9000"})
    assert ok.status_code == 200 and ok.headers["access-control-allow-origin"] == "http://dash.localhost:9000"
    assert httpx.get(f"{base}/problems/cors-origin-not-allowed").status_code == 200


def test_cors_preflight_without_any_listed_origin(tmp_path, kit):
    with kit.service(tmp_path / "svc", worker=False) as (base, _, _):
        r = httpx.options(f"{base}/v1/models", headers={"Origin": "http://x.localhost", "Access-Control-Request-Method": "GET"})
        assert r.status_code == 403 and "(now: none)" in r.json()["detail"]
        plain = httpx.options(f"{base}/v1/models")  # not a preflight: the route's own answer
        assert plain.status_code == 405
