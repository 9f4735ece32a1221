"""Predictions from the live version or a pinned version; JSON or CSV in, JSON or CSV out.

The version is resolved once per request and its loaded object answers everything: the numbers, the
intervals, the warnings and the ``model`` block. Single rows are computed inline (microseconds of
numpy on precomputed basis arrays); larger batches go to a worker thread so the event loop stays free.
"""

from __future__ import annotations

from typing import Any

from anyio import to_thread
from fastapi import APIRouter, Request
from fastapi.responses import Response
from starlette.requests import ClientDisconnect

from service.api import auth, levels, predict_io
from service.api.model_cache import Served
from service.api.stale import note_stale
from service.api.schemas import PredictRequest, PredictResponse, schema_ref
from service.errors import InvalidData
from service.store.names import validate_name
from service.store.schema import VERSION_MAX

router = APIRouter(prefix="/v1", tags=["predictions"])

INLINE_ROWS = 256  # up to this many rows are computed on the event loop (well under a millisecond)

_DOC = {
    **auth.PREDICT["openapi_extra"],
    "requestBody": {
        "required": True,
        "content": {
            "application/json": {"schema": schema_ref(PredictRequest)},
            "text/csv": {"schema": {"type": "string", "format": "binary", "description": "CSV with a header of the "
                                    "model's input columns; the interval level goes in the 'interval_level' query parameter."}},
        },
    },
    "responses": {
        "200": {
            "description": "One prediction per input row, in order, and the version that produced them.",
            "content": {
                "application/json": {"schema": schema_ref(PredictResponse)},
                "text/csv": {"schema": {"type": "string", "format": "binary", "description": "Columns value[,lower,upper],warnings; the "
                             "version is in the Tikhon-Model and Tikhon-Model-Version headers."}},
            },
        }
    },
}

# The path and query parameters are read from the request directly (no per-request dependency
# solving on the hottest route); they are documented here instead.
_PARAMS = {
    "name": {"name": "name", "in": "path", "required": True, "schema": {"type": "string"}, "description": "Model name."},
    "version": {"name": "version", "in": "path", "required": True, "schema": {"type": "integer", "minimum": 1, "maximum": VERSION_MAX},
                "description": "Version number."},
    "interval_level": {"name": "interval_level", "in": "query", "required": False,
                 "schema": {"type": "number", "exclusiveMinimum": 0, "exclusiveMaximum": 1},
                 "description": "CSV form only: the interval level for a CSV body. A JSON body carries its level in "
                 "its own 'interval_level' member (this parameter is read for a JSON body only when that member is absent)."},
    "unseen_levels": {"name": "unseen_levels", "in": "query", "required": False,
                      "schema": {"$ref": "#/components/schemas/UnseenLevels"},
                      "description": "CSV form only: 'warn' answers a category level not seen in training with a "
                      "warning, 'refuse' answers 422 (JSON bodies use the 'unseen_levels' field)."},
}
_LIVE_DOC = {**_DOC, "parameters": [_PARAMS["name"], _PARAMS["interval_level"], _PARAMS["unseen_levels"]]}
_PINNED_DOC = {**_DOC, "parameters": [_PARAMS["name"], _PARAMS["version"], _PARAMS["interval_level"],
                                     _PARAMS["unseen_levels"]]}


def _query_interval_level(request: Request) -> float | None:
    if not request.scope.get("query_string"):  # the usual case: no query string to parse
        return None
    raw = request.query_params.get("interval_level")
    if raw is None:
        if "interval" in request.query_params:  # the name before this release: refused, never ignored
            raise InvalidData("query parameter 'interval' is now called 'interval_level'; send ?interval_level=0.9.",
                              errors=[{"field": "query.interval", "message": "renamed to interval_level"}])
        return None
    try:
        value = float(raw)
    except ValueError:
        value = raw
    return predict_io.check_interval_level(value, "query.interval_level")


def _version(raw: str) -> int:
    # digits checked before int(): a number beyond the catalog's range (or past Python's 4300-digit limit
    # on int()) is refused here rather than raising an OverflowError or ValueError further down
    if not (raw.isascii() and raw.isdigit() and len(raw) <= len(str(VERSION_MAX))) or not 1 <= int(raw) <= VERSION_MAX:
        raise InvalidData(
            f"path.version must be a whole number from 1 to {VERSION_MAX}, got {raw[:40]!r}.",
            errors=[{"field": "path.version", "value": raw[:40], "message": f"expected an integer from 1 to {VERSION_MAX}"}],
        )
    return int(raw)


@router.post("/models/{name}/predictions", summary="Predict with the live version", openapi_extra=_LIVE_DOC,
             operation_id="predict")
async def predict_live(request: Request) -> Response:
    await auth.authorize(request)  # the key check every /v1 route has (see app.create_app)
    name = validate_name(request.path_params["name"])
    interval_level = _query_interval_level(request)
    cache = request.app.state.models
    version = cache.cached_live(name)
    if version is None:
        version, age = await cache.lookups.run(("live", name), cache.live_version_stale, name)
        if age is not None:
            note_stale(request, age)
    served = cache.cached(name, version) or await cache.lookups.run(("load", name, version), cache.load, name, version)
    return await _predict(request, served, interval_level)


@router.post("/models/{name}/versions/{version}/predictions", summary="Predict with a pinned version", openapi_extra=_PINNED_DOC,
             operation_id="predictVersion")
async def predict_version(request: Request) -> Response:
    await auth.authorize(request)  # the key check every /v1 route has (see app.create_app)
    name = validate_name(request.path_params["name"])
    version = _version(request.path_params["version"])
    interval_level = _query_interval_level(request)
    cache = request.app.state.models
    served = cache.cached(name, version) or await cache.lookups.run(("load", name, version), cache.load, name, version)
    return await _predict(request, served, interval_level)


async def read_body(request: Request) -> bytes:
    """``await request.body()`` without the async generator Starlette reads it through (its creation, the event
    loop's bookkeeping of live generators and its finalization cost more than reading a one-row body)."""
    chunks: list[bytes] = []
    receive = request.receive
    while True:
        message = await receive()
        if message["type"] == "http.request":
            chunk = message.get("body", b"")
            if chunk:
                chunks.append(chunk)
            if not message.get("more_body", False):
                break
        elif message["type"] == "http.disconnect":
            request._is_disconnected = True
            raise ClientDisconnect()
    body = chunks[0] if len(chunks) == 1 else b"".join(chunks)
    request._body = body  # what request.body() gives anything that asks later (as Starlette keeps it)
    request._stream_consumed = True
    return body


def _compute(served: Served, cols: dict, interval_level: float | None, unseen: str, ask: predict_io.Ask,
             limits: dict[str, Any], monitor: Any) -> tuple[int, bytes | str, str, dict]:
    """Everything after reading the body: unseen levels, the numbers, monitoring's append, the answer."""
    if unseen == "refuse" and served.model.categories.names:
        levels.refuse_unseen(served.model, cols)
    detail = served.model.predict_detail(cols, interval_level=interval_level, memory_bytes=limits["predict_memory_bytes"])
    monitor.observe(served, cols, detail)  # an append (counted off the request path), or counted here when large
    return (int(detail["value"].shape[0]), *predict_io.answer(served, detail, interval_level, ask))


async def _predict(request: Request, served: Served, interval_level_q: float | None) -> Response:
    state = request.app.state
    content_type = auth.raw_header(request.scope, b"content-type") or ""
    mt = content_type.split(";", 1)[0].strip().lower()  # as render.media_type
    ask = predict_io.Ask(mt, auth.raw_header(request.scope, b"accept") or "", interval_level_q,
                         request.query_params.get("unseen_levels") if mt == "text/csv" else None)
    raw = await read_body(request)
    if state.predict_lane.takes(len(raw)):  # a large body: answered in a lower-priority process
        n, payload, media, headers, counts = await state.predict_lane.answer(
            served, raw, ask, state.predict_limits, state.monitor.enabled)
        state.monitor.add_inputs(served, counts)
    else:
        limits = state.predict_limits
        if len(raw) > 65536:
            cols, interval_level, n, unseen = await to_thread.run_sync(predict_io.read, served, raw, ask, limits)
        else:
            cols, interval_level, n, unseen = predict_io.read(served, raw, ask, limits)
        if n <= INLINE_ROWS:
            n, payload, media, headers = _compute(served, cols, interval_level, unseen, ask, limits, state.monitor)
        else:
            n, payload, media, headers = await to_thread.run_sync(
                _compute, served, cols, interval_level, unseen, ask, limits, state.monitor)
    state.metrics.count_predictions(served.name, served.version, n)
    return Answer(payload, media, headers)


class Answer(Response):
    """A prediction's answer: Starlette's ``Response(payload, media_type=media, headers=headers)``, the same
    status, body and header list, with the list written directly (the general constructor's checks and
    look-ups cost a few microseconds a request)."""

    _TYPES = {"application/json": b"application/json", "text/csv": b"text/csv; charset=utf-8"}

    def __init__(self, payload: bytes | str, media: str, headers: dict[str, str] | None = None) -> None:
        self.status_code = 200
        self.background = None
        self.media_type = media
        self.body = payload.encode("utf-8") if isinstance(payload, str) else payload
        raw = [(k.lower().encode("latin-1"), v.encode("latin-1")) for k, v in headers.items()] if headers else []
        raw.append((b"content-length", str(len(self.body)).encode("latin-1")))
        kind = self._TYPES.get(media) or (media + "; charset=utf-8" if media.startswith("text/") else media).encode("latin-1")
        raw.append((b"content-type", kind))
        self.raw_headers = raw
