"""The one boundary where errors become HTTP: RFC 9457 ``application/problem+json`` responses.

``service.problems`` builds the problem bodies (plain dicts, status per error class); this module sends
them, and registers the app's exception handlers (``install``): a ``TikhonError`` raised anywhere below,
FastAPI's request-validation errors, Starlette's HTTP errors (unknown route, wrong method) and any
unexpected exception are all rendered the same way. An unexpected exception is logged with its
traceback on the server and answered with a 500 problem that carries the request id and nothing of the
traceback.
"""

from __future__ import annotations

import logging
from typing import Any

import orjson
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import Response

from service import errors as E
from service.problems import (
    CATALOG_RETRY_AFTER_S,
    PROBLEM_MEDIA_TYPE,
    internal_error_body,
    problem_body,
    problem_from_error,
)

log = logging.getLogger("tikhon.api")


def problem_response(body: dict[str, Any], headers: dict[str, str] | None = None) -> Response:
    return Response(
        orjson.dumps(body, option=orjson.OPT_SERIALIZE_NUMPY), status_code=body["status"],
        media_type=PROBLEM_MEDIA_TYPE, headers=headers,
    )



def _request_id(request: Request) -> str | None:
    return request.scope.get("state", {}).get("request_id") if isinstance(request.scope.get("state"), dict) else None


def _where(loc: tuple | list) -> str:
    parts = [str(p) for p in loc]
    if parts and parts[0] in ("body", "query", "path", "header"):
        # "body" is noise for callers; keep query/path/header because they say where to look.
        if parts[0] == "body":
            parts = parts[1:]
    return ".".join(parts) or "body"


def validation_problem(exc: RequestValidationError, request: Request) -> dict[str, Any]:
    errs = exc.errors()
    if any(e.get("type") == "json_invalid" for e in errs):
        e0 = next(e for e in errs if e.get("type") == "json_invalid")
        ctx = e0.get("ctx", {}) or {}
        return problem_body(
            slug="malformed-request", title="Malformed request body", status=400,
            detail=f"The request body is not valid JSON ({ctx.get('error', 'parse error')}); send a JSON object "
            "as documented at /docs (NaN and Infinity are not JSON: send finite numbers).",
            instance=request.url.path, request_id=_request_id(request),
        )
    items = []
    for e in errs:
        field = _where(e.get("loc", ()))
        item = {"field": field, "message": e.get("msg", "invalid value")}
        if "input" in e and e.get("type") != "missing":
            item["value"] = e["input"]
        items.append(item)
    first = items[0]
    detail = f"{first['field']}: {first['message']}"
    if len(items) > 1:
        detail += f" (and {len(items) - 1} more problem{'s' if len(items) > 2 else ''}, listed in 'errors')"
    detail += "; fix the field(s) as described in the OpenAPI document at /openapi.json."
    return problem_body(
        slug="invalid-request", title="Invalid request", status=422, detail=detail,
        instance=request.url.path, request_id=_request_id(request), errors=items,
    )


def install(app: FastAPI) -> None:
    """Register the handlers on ``app``. Called once by the app factory."""

    @app.exception_handler(E.TikhonError)
    async def _tikhon(request: Request, exc: E.TikhonError) -> Response:
        headers = {"WWW-Authenticate": 'Bearer realm="tikhon"'} if isinstance(exc, E.Unauthorized) else None
        if isinstance(exc, E.CatalogUnavailable):
            headers = {"Retry-After": str(CATALOG_RETRY_AFTER_S)}
        elif isinstance(exc, E.Busy):  # RFC 9110 section 10.2.3: when to try again, in seconds
            headers = {"Retry-After": str(int(exc.extra.get("retry_after", 30)))}
        body = problem_from_error(exc, instance=request.url.path, request_id=_request_id(request))
        if isinstance(exc, E.CatalogUnavailable):  # an outage: one line per request, not an error each
            log.warning("request refused, catalog unavailable: %s", exc, extra={"request_id": _request_id(request)})
        elif body["status"] >= 500:
            log.error("request failed: %s", exc, extra={"request_id": _request_id(request)})
        return problem_response(body, headers)

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError) -> Response:
        return problem_response(validation_problem(exc, request))

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> Response:
        rid = _request_id(request)
        if exc.status_code == 404:
            body = problem_body(
                slug="route-not-found", title="No such route", status=404,
                detail=f"No route matches {request.method} {request.url.path}; the routes are listed in /openapi.json.",
                instance=request.url.path, request_id=rid,
            )
        elif exc.status_code == 405:
            body = problem_body(
                slug="method-not-allowed", title="Method not allowed", status=405,
                detail=f"{request.url.path} does not accept {request.method}; "
                f"use one of: {(exc.headers or {}).get('Allow', 'see /openapi.json')}.",
                instance=request.url.path, request_id=rid,
            )
        elif exc.status_code == 400:
            body = problem_body(
                slug="malformed-request", title="Malformed request body", status=400,
                detail=f"The request body could not be read ({exc.detail}); send JSON, CSV or multipart as documented at /docs.",
                instance=request.url.path, request_id=rid,
            )
        else:
            body = problem_body(
                slug="malformed-request" if exc.status_code < 500 else "internal-error",
                title=str(exc.detail) if exc.status_code < 500 else "Internal error",
                status=exc.status_code, detail=str(exc.detail), instance=request.url.path, request_id=rid,
            )
        return problem_response(body, dict(exc.headers or {}))

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception) -> Response:
        rid = _request_id(request)
        log.exception("unhandled error", extra={"request_id": rid})
        return problem_response(internal_error_body(request.url.path, rid))
