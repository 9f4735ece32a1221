"""The error boundary: every failure becomes RFC 9457 problem+json; the body limit counts bytes.

Source for the problem shape: RFC 9457 (Problem Details for HTTP APIs), sections 3 and 3.1: members
``type``, ``title``, ``status``, ``detail``, ``instance``, and the media type application/problem+json.
These tests build a tiny app from the same pieces the real factory uses, under real uvicorn.
"""

from __future__ import annotations

import httpx
import pytest
from fastapi import FastAPI, Request
from pydantic import BaseModel

from service import errors as E
from service import problems
from service.api import exception_handlers
from service.api.middleware import BodyLimit, RequestContext
from service.api.metrics import ApiMetrics

LIMIT = 4096


class Payload(BaseModel):
    count: int
    label: str


def build_app() -> FastAPI:
    app = FastAPI()
    exception_handlers.install(app)

    @app.post("/typed")
    async def typed(body: Payload):
        return {"count": body.count}

    @app.post("/echo")
    async def echo(request: Request):
        data = await request.body()
        return {"bytes": len(data)}

    @app.get("/raise/{kind}")
    async def raise_(kind: str):
        classes = {
            "spec": E.InvalidSpec, "data": E.InvalidData, "name": E.InvalidName, "missing": E.NotFound,
            "conflict": E.Conflict, "storage": E.StorageFailure, "integrity": E.IntegrityFailure,
            "unauthorized": E.Unauthorized, "forbidden": E.Forbidden,
        }
        if kind == "grid":
            raise E.BudgetExceeded("grid too large; shrink it", limit="max_grid_fits", allowed=10, received=11)
        if kind == "rows":
            raise E.BudgetExceeded("too many rows; split", limit="max_rows_per_request", allowed=10, received=11)
        if kind == "bug":
            raise RuntimeError("secret internal detail /etc/passwd")
        raise classes[kind](f"{kind} went wrong; fix it", errors=[{"field": "x", "value": 1, "message": "bad"}])

    metrics = ApiMetrics()
    app.add_middleware(BodyLimit, limit=LIMIT)
    app.add_middleware(RequestContext, metrics=metrics)
    app.state.metrics = metrics
    return app


@pytest.fixture(scope="module")
def base(serve):
    with serve(build_app()) as url:
        yield url


def assert_problem(r: httpx.Response, status: int) -> dict:
    assert r.status_code == status, r.text
    assert r.headers["content-type"] == "application/problem+json"
    body = r.json()
    # RFC 9457 section 3.1: the standard members.
    assert body["status"] == status
    assert body["type"].startswith("/problems/")
    assert body["title"] and body["detail"]
    assert "Traceback" not in r.text
    assert r.headers["x-request-id"]
    return body


@pytest.mark.parametrize(
    "kind,status,slug",
    [
        ("spec", 422, "invalid-spec"), ("data", 422, "invalid-data"), ("name", 422, "invalid-name"),
        ("missing", 404, "not-found"), ("conflict", 409, "conflict"), ("storage", 507, "storage-failure"),
        ("integrity", 500, "integrity-failure"), ("unauthorized", 401, "unauthorized"),
        ("forbidden", 403, "forbidden"), ("grid", 422, "limit-exceeded"), ("rows", 413, "limit-exceeded"),
    ],
)
def test_each_error_class_has_its_status(base, kind, status, slug):
    r = httpx.get(f"{base}/raise/{kind}")
    body = assert_problem(r, status)
    assert body["type"] == f"/problems/{slug}"
    assert body["instance"] == f"/raise/{kind}"
    if kind in ("grid", "rows"):
        assert body["limit"] in ("max_grid_fits", "max_rows_per_request")
        assert body["allowed"] == 10 and body["received"] == 11
    else:
        assert body["errors"] == [{"field": "x", "value": 1, "message": "bad"}]
    if kind == "unauthorized":
        assert r.headers["www-authenticate"].lower().startswith("bearer")


def test_unexpected_exception_leaks_nothing(base):
    r = httpx.get(f"{base}/raise/bug", headers={"X-Request-Id": "abc-123"})
    body = assert_problem(r, 500)
    assert "passwd" not in r.text and "RuntimeError" not in r.text
    assert body["request_id"] == "abc-123" and r.headers["x-request-id"] == "abc-123"


def test_malformed_json_is_400(base):
    r = httpx.post(f"{base}/typed", content=b'{"count": 1,', headers={"content-type": "application/json"})
    body = assert_problem(r, 400)
    assert body["type"] == "/problems/malformed-request"


def test_validation_names_each_field(base):
    r = httpx.post(f"{base}/typed", json={"count": "many"})
    body = assert_problem(r, 422)
    fields = sorted(e["field"] for e in body["errors"])
    assert fields == ["count", "label"]
    assert next(e for e in body["errors"] if e["field"] == "count")["value"] == "many"


def test_unknown_route_and_method(base):
    assert_problem(httpx.get(f"{base}/nowhere"), 404)
    body = assert_problem(httpx.get(f"{base}/typed"), 405)
    assert "POST" in body["detail"]


def test_body_limit_by_declared_length(base):
    r = httpx.post(f"{base}/echo", content=b"x" * (LIMIT + 1))
    body = assert_problem(r, 413)
    assert body["limit"] == "max_body_bytes" and body["allowed"] == LIMIT and body["received"] == LIMIT + 1
    assert "max_body_bytes" in body["detail"]


def test_body_limit_counts_streamed_bytes(base):
    # No Content-Length (chunked transfer): the limit must be enforced on the bytes actually received.
    def chunks():
        for _ in range(10):
            yield b"y" * 1000

    r = httpx.post(f"{base}/echo", content=chunks())
    assert "content-length" not in r.request.headers
    body = assert_problem(r, 413)
    assert body["limit"] == "max_body_bytes"


def test_body_under_limit_passes(base):
    r = httpx.post(f"{base}/echo", content=b"z" * LIMIT)
    assert r.status_code == 200 and r.json() == {"bytes": LIMIT}


def test_catalogue_covers_every_error_class():
    cat = problems.catalogue()
    for cls in (E.InvalidSpec, E.InvalidData, E.BudgetExceeded, E.InvalidName, E.NotFound, E.Conflict,
                E.IntegrityFailure, E.StorageFailure, E.Cancelled, E.Unauthorized, E.Forbidden):
        assert cls.slug in cat and cat[cls.slug]["title"] == cls.title
