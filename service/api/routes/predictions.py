"""Predictions from the live version or a pinned version; JSON or CSV in, JSON or CSV out.

The version is resolved once per request and its loaded object answers everything: the numbers, the
intervals, the warnings and the ``model`` block. Single rows are computed inline (microseconds of
numpy on precomputed basis arrays); larger batches go to a worker thread so the event loop stays free.
"""

from __future__ import annotations

import csv
import functools
import io
import math
from typing import Any

import orjson
from anyio import to_thread
from fastapi import APIRouter, Request
from fastapi.responses import Response

from service.csvcells import number_cell, text_cell
from service import tables
from service.api import auth, levels
from service.api.model_cache import Served
from service.api.render import media_type, parse_json
from service.problems import UnsupportedMediaType
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
    return _check_interval_level(value, "query.interval_level")


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


def _check_interval_level(value: Any, field: str) -> float | None:
    if value is None:
        return None
    if type(value) not in (int, float) or not math.isfinite(value) or not 0 < value < 1:
        raise InvalidData(
            f"{field} must be a number strictly between 0 and 1 (the interval level, e.g. 0.9), got {value!r}.",
            errors=[{"field": field, "value": value, "message": "expected 0 < interval_level < 1"}],
        )
    return float(value)


def _parse_json_body(raw: bytes, limit: int, interval_level_q: float | None, max_label: int | None = tables.MAX_LABEL_CHARS
                     ) -> tuple[dict, float | None, int, str]:
    body = parse_json(raw)
    if not isinstance(body, dict):
        raise InvalidData(
            f"the body must be a JSON object {{\"rows\": [...], \"interval_level\": 0.9}}, got a {type(body).__name__}.",
            errors=[{"field": "body", "message": "expected an object"}],
        )
    extra = sorted(set(body) - {"rows", "interval_level", "unseen_levels"})
    if extra:
        raise InvalidData(
            f"unknown field(s) {extra} in the body; only 'rows', 'interval_level' and 'unseen_levels' are read"
            + (" ('interval' is now called 'interval_level')." if "interval" in extra else "."),
            errors=[{"field": k, "message": "unknown field"} for k in extra],
        )
    if "rows" not in body:
        raise InvalidData("the body lacks 'rows', the list of input rows.", errors=[{"field": "rows", "message": "missing"}])
    interval_level = (_check_interval_level(body.get("interval_level"), "interval_level") if "interval_level" in body
                      else interval_level_q)
    rows = body["rows"]
    if isinstance(rows, list):
        tables.check_row_limit(len(rows), limit, "max_rows_per_request", "rows")
    cols = tables.from_rows(rows, where="rows", max_label=max_label)
    return cols, interval_level, len(rows), levels.mode(body.get("unseen_levels"), "unseen_levels")


def _compute(served: Served, cols: dict, interval_level: float | None, memory_bytes: int) -> dict[str, Any]:
    return served.model.predict_detail(cols, interval_level=interval_level, memory_bytes=memory_bytes)


async def _predict(request: Request, served: Served, interval_level_q: float | None) -> Response:
    settings = request.app.state.settings
    limit = settings.max_rows_per_request
    max_label = settings.max_label_chars
    content_type = auth.raw_header(request.scope, b"content-type") or ""
    mt = content_type.split(";", 1)[0].strip().lower()  # as render.media_type
    raw = await request.body()
    if mt == "text/csv":
        labels = set(served.model.categories.names)  # read as text: a level "01" is not the number 1
        if len(raw) > 65536:
            cols = await to_thread.run_sync(functools.partial(tables.from_csv, raw, where="body", max_label=max_label,
                                                              spec=labels))
        else:
            cols = tables.from_csv(raw, where="body", max_label=max_label, spec=labels)
        n = len(next(iter(cols.values())))
        tables.check_row_limit(n, limit, "max_rows_per_request", "the CSV body")
        interval_level = interval_level_q
        unseen = levels.mode(request.query_params.get("unseen_levels"), "query.unseen_levels")
    elif mt in ("", "application/json") or mt.endswith("+json"):
        if len(raw) > 65536:
            cols, interval_level, n, unseen = await to_thread.run_sync(_parse_json_body, raw, limit, interval_level_q, max_label)
        else:
            cols, interval_level, n, unseen = _parse_json_body(raw, limit, interval_level_q, max_label)
    else:
        raise UnsupportedMediaType(
            f"Content-Type {mt!r} is not read here; send application/json ({{\"rows\": [...]}}) or text/csv."
        )
    if unseen == "refuse" and served.model.categories.names:
        levels.refuse_unseen(served.model, cols)
    if n <= INLINE_ROWS:
        detail = _compute(served, cols, interval_level, settings.predict_memory_bytes)
    else:
        detail = await to_thread.run_sync(_compute, served, cols, interval_level, settings.predict_memory_bytes)
    request.app.state.metrics.count_predictions(served.name, served.version, n)
    request.app.state.monitor.observe(served, cols, detail)  # an append; counted off the request path
    accept = auth.raw_header(request.scope, b"accept") or ""
    if "text/csv" in accept or (mt == "text/csv" and "application/json" not in accept):
        text = _csv(detail, interval_level is not None) if n <= INLINE_ROWS else await to_thread.run_sync(_csv, detail, interval_level is not None)
        return Response(text, media_type="text/csv", headers={
            "Tikhon-Model": served.name, "Tikhon-Model-Version": str(served.version)})
    payload = _json(served, detail, interval_level is not None) if n <= INLINE_ROWS else await to_thread.run_sync(
        _json, served, detail, interval_level is not None)
    return Response(payload, media_type="application/json")


_NUMPY = orjson.OPT_SERIALIZE_NUMPY
SMALL_JSON_ROWS = 16  # up to this many rows the answer is written from Python objects (fewer calls than splicing)


def _numbers(column) -> list[bytes]:
    """A float column as JSON number texts (orjson writes numpy floats exactly as Python floats; a non-finite
    value becomes null, as it would from a list of floats)."""
    return orjson.dumps(column, option=_NUMPY)[1:-1].split(b",")


def _json(served: Served, detail: dict[str, Any], with_interval: bool) -> bytes:
    """``{"model": ..., "predictions": [{"value", ["interval",] "warnings"}, ...]}`` built from the column
    arrays: each column is serialized once and the row objects are spliced from fixed pieces, so no dict or
    float object is made per row; only rows that carry warnings are serialized one by one."""
    value = detail["value"]
    m = int(value.shape[0])
    if m == 0:
        return b'{"model":' + served.block_json + b',"predictions":[]}'
    if m <= SMALL_JSON_ROWS:  # a few rows: one orjson call on plain objects writes the same bytes
        if with_interval:
            rows = [{"value": v, "interval": [a, b], "warnings": w} for v, a, b, w in zip(
                value.tolist(), detail["lower"].tolist(), detail["upper"].tolist(), detail["warnings"])]
        else:
            rows = [{"value": v, "warnings": w} for v, w in zip(value.tolist(), detail["warnings"])]
        return b'{"model":' + served.block_json + b',"predictions":' + orjson.dumps(rows) + b"}"
    if with_interval:
        pieces = [b'{"value":', None, b',"interval":[', None, b",", None, b'],"warnings":[]}', b","]
        columns = {1: _numbers(value), 3: _numbers(detail["lower"]), 5: _numbers(detail["upper"])}
    else:
        pieces = [b'{"value":', None, b',"warnings":[]}', b","]
        columns = {1: _numbers(value)}
    width = len(pieces)
    parts: list[bytes | None] = [None] * (width * m)
    for k, piece in enumerate(pieces):
        parts[k::width] = columns[k] if piece is None else [piece] * m
    closing = width - 2  # the piece that ends a row object, holding its (empty) warnings
    tail = pieces[closing][: -len(b'[]}')]
    for i, w in enumerate(detail["warnings"]):
        if w:
            parts[i * width + closing] = tail + orjson.dumps(w) + b"}"
    parts[-1] = b""  # no comma after the last row
    return b'{"model":' + served.block_json + b',"predictions":[' + b"".join(parts) + b"]}"


def _csv(detail: dict[str, Any], with_interval: bool) -> str:
    """CSV answer; numbers are written with Python's shortest round-trip repr, so they parse back exactly
    (a non-finite value as an empty cell); text cells are neutralized against formula injection."""
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    values = [number_cell(v) for v in detail["value"].tolist()]
    warn = [text_cell("; ".join(ws)) for ws in detail["warnings"]]  # labels and names come from callers
    if with_interval:
        w.writerow(["value", "lower", "upper", "warnings"])
        lower = [number_cell(v) for v in detail["lower"].tolist()]
        upper = [number_cell(v) for v in detail["upper"].tolist()]
        w.writerows(zip(values, lower, upper, warn))
    else:
        w.writerow(["value", "warnings"])
        w.writerows(zip(values, warn))
    return out.getvalue()
