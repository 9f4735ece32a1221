"""The prediction routes are answered ahead of FastAPI's router (``service.api.fastpath``) and keep every
layer a caller sees: key checks and their problem details, request ids, the access log line, Prometheus
metrics by route template, CORS headers, the router's 405 for other methods and the OpenAPI document.

The access log line is written without a ``LogRecord`` when logging is set up as ``tikhon serve`` sets it
(``service.logs.line``); it is the line ``logging`` writes, field for field."""

from __future__ import annotations

import io
import json
import logging

import httpx
import numpy as np
import pytest

from service import logs
from service.engine import tune

NAME = "pump-lean"
LIVE = f"/v1/models/{NAME}/predictions"
ROW = {"flow_lps": 61.5, "head_m": 33.0}
ORIGIN = "http://dash.localhost:9000"


@pytest.fixture(scope="module")
def lean(tmp_path_factory, kit):
    with kit.service(tmp_path_factory.mktemp("lean"), worker=False, cors_origins=[ORIGIN]) as (base, store, settings):
        result = tune(kit.pump_table(150, seed=8), kit.SPEC)
        body, arrays = result.to_artifact()
        store.publish(NAME, body, arrays)
        store.set_live(NAME, 1, actor="test", reason="fixture")
        yield base, store, result


@pytest.fixture
def access_lines():
    """Capture the JSON log lines as ``tikhon serve`` configures them (service.logs.configure)."""
    buf = io.StringIO()
    logs.configure("info", stream=buf)
    try:
        yield lambda: [json.loads(line) for line in buf.getvalue().splitlines()]
    finally:
        logs.configure("warning")


def test_open_server_answers_logs_and_counts_as_before(lean, access_lines):
    base, _, result = lean
    r = httpx.post(f"{base}{LIVE}", json={"rows": [ROW]}, headers={"X-Request-Id": "lean-1", "Origin": ORIGIN},
                   timeout=60)
    assert r.status_code == 200, r.text
    assert r.headers["x-request-id"] == "lean-1"
    assert r.headers["access-control-allow-origin"] == ORIGIN  # CORS still wraps the route
    expected = result.model.predict_detail({k: np.array([v]) for k, v in ROW.items()})
    assert r.json()["predictions"][0]["value"] == float(expected["value"][0])  # the engine's number, bit for bit
    line = [e for e in access_lines() if e.get("request_id") == "lean-1"]
    assert len(line) == 1 and line[0]["route"] == "/v1/models/{name}/predictions" and line[0]["status"] == 200
    assert line[0]["logger"] == "tikhon.api.access" and line[0]["msg"] == "request" and line[0]["method"] == "POST"
    # problems from the endpoint: an unknown model (404 with the closest names) and a bad body (422)
    missing = httpx.post(f"{base}/v1/models/pump-lan/predictions", json={"rows": [ROW]}, timeout=60)
    assert missing.status_code == 404 and missing.headers["content-type"] == "application/problem+json"
    assert NAME in missing.json()["detail"] and missing.json()["request_id"] == missing.headers["x-request-id"]
    bad = httpx.post(f"{base}{LIVE}", content=b"{not json", headers={"content-type": "application/json"}, timeout=60)
    assert bad.status_code in (400, 422) and bad.headers["content-type"] == "application/problem+json"
    # another method on the same path still gets the router's answer
    other = httpx.get(f"{base}{LIVE}", timeout=60)
    assert other.status_code == 405 and other.headers["content-type"] == "application/problem+json"
    metrics = httpx.get(f"{base}/metrics", timeout=60).text
    assert 'tikhon_http_requests_total{method="POST",route="/v1/models/{name}/predictions",status="200"}' in metrics
    assert 'tikhon_http_requests_total{method="POST",route="/v1/models/{name}/predictions",status="404"}' in metrics
    doc = httpx.get(f"{base}/openapi.json", timeout=60).json()
    op = doc["paths"]["/v1/models/{name}/predictions"]["post"]
    assert "predict" in op["x-tikhon-scopes"] and "requestBody" in op  # no key exists here, so no security requirement


def test_keys_are_checked_on_the_lean_path(lean):
    base, store, _ = lean
    _, reader = store.keys.create(["train"], "not a predictor")
    _, predictor = store.keys.create(["predict"], "predictor")
    try:
        none = httpx.post(f"{base}{LIVE}", json={"rows": [ROW]}, timeout=60)
        assert none.status_code == 401 and none.headers["content-type"] == "application/problem+json"
        assert none.headers["www-authenticate"].startswith("Bearer")
        wrong = httpx.post(f"{base}{LIVE}", json={"rows": [ROW]}, timeout=60, headers={"Authorization": f"Bearer {reader}"})
        assert wrong.status_code == 403 and wrong.json()["allowed"] == ["admin", "predict"]
        ok = httpx.post(f"{base}{LIVE}", json={"rows": [ROW]}, timeout=60, headers={"Authorization": f"Bearer {predictor}"})
        assert ok.status_code == 200 and ok.json()["model"]["version"] == 1
    finally:
        for row in store.keys.list():
            store.keys.revoke(row["key_id"])


def test_the_direct_log_line_is_the_logging_line():
    buf = io.StringIO()
    logs.configure("info", stream=buf)
    try:
        access = logging.getLogger("tikhon.api.access")
        fields = {"request_id": "r1", "method": "POST", "path": "/x", "route": "/x", "status": 200,
                  "duration_ms": 1.25, "client": "127.0.0.1"}
        access.info("request", extra=fields)
        logs.line(access, logging.INFO, "request", fields)
        first, second = (json.loads(x) for x in buf.getvalue().splitlines())
        assert list(first) == list(second)  # the same fields in the same order
        assert {k: v for k, v in first.items() if k != "ts"} == {k: v for k, v in second.items() if k != "ts"}
        # a filter on the way: the record goes through logging, which applies it
        access.addFilter(lambda record: False)
        logs.line(access, logging.INFO, "request", fields)
        access.filters.clear()
        assert len(buf.getvalue().splitlines()) == 2
        logging.getLogger("tikhon").setLevel(logging.WARNING)  # below the level: nothing
        logs.line(access, logging.INFO, "request", fields)
        assert len(buf.getvalue().splitlines()) == 2
    finally:
        logs.configure("warning")


def test_the_answer_is_starlettes_response():
    # The prediction answer writes its header list itself; Starlette's Response is the reference.
    from starlette.responses import Response

    from service.api.routes.predictions import Answer

    for payload, media, headers in [(b'{"model":{},"predictions":[]}', "application/json", {}),
                                    ("value,warnings\n1.5,\n", "text/csv", {"Tikhon-Model": "p", "Tikhon-Model-Version": "3"})]:
        ours, ref = Answer(payload, media, headers), Response(payload, media_type=media, headers=headers or None)
        assert (ours.status_code, ours.body, ours.raw_headers) == (ref.status_code, ref.body, ref.raw_headers)


def test_request_metrics_render_as_prometheus_clients_own():
    # One process keeps the per-request counters as plain numbers (service.api.metrics._Tally); the text it
    # renders must be what prometheus_client's Counter and Histogram give for the same observations, apart from
    # the _created time stamps (when each label set was first seen).
    import re

    from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest

    from service.api import metrics as metrics_module

    ours = metrics_module.ApiMetrics()
    registry = CollectorRegistry(auto_describe=True)
    requests = Counter("tikhon_http_requests", metrics_module._HELP["requests"], ["route", "method", "status"], registry=registry)
    latency = Histogram("tikhon_http_request_seconds", metrics_module._HELP["latency"], ["route", "method"],
                        buckets=metrics_module._BUCKETS, registry=registry)
    predictions = Counter("tikhon_predictions", metrics_module._HELP["predictions"], ["model", "version"], registry=registry)
    hits = Counter("tikhon_model_cache_hits", metrics_module._HELP["cache_hits"], registry=registry)
    seen = [("POST", "/v1/models/{name}/predictions", 200, s) for s in (0.0004, 0.0005, 0.001, 0.0011, 0.3, 12.0)]
    seen += [("GET", "/v1/models", 404, 0.002), ("POST", "/v1/models/{name}/predictions", 422, 0.0)]
    for method, route, status, s in seen:
        ours.observe_request(method, route, status, s)
        requests.labels(route, method, str(status)).inc()
        latency.labels(route, method).observe(s)
    for model, version, rows in [("pumps", 1, 3), ("pumps", 2, 10_000), ("pumps", 1, 1)]:
        ours.count_predictions(model, version, rows)
        predictions.labels(model, str(version)).inc(rows)
    for _ in range(4):
        ours.cache_hit()
        hits.inc()

    def comparable(text: bytes) -> list[str]:
        lines = [x for x in text.decode().splitlines() if "_created" not in x]
        return [re.sub(r"^(tikhon_http_request_seconds_sum\{[^}]*\}) (\S+)$", lambda m: f"{m[1]} {float(m[2]):.12g}", x)
                for x in lines]

    expected = comparable(generate_latest(registry))
    got = [x for x in comparable(ours.render()) if not x.startswith(("tikhon_model_cache_misses", "tikhon_catalog_stale",
                                                                       "# HELP tikhon_model_cache_misses", "# TYPE tikhon_model_cache_misses",
                                                                       "# HELP tikhon_catalog_stale", "# TYPE tikhon_catalog_stale"))]
    assert got == expected
    created = [x for x in ours.render().decode().splitlines() if "_created{" in x or x.startswith("tikhon_model_cache_hits_created")]
    assert len(created) == 3 + 2 + 2 + 1  # one per label set, as prometheus_client writes them
