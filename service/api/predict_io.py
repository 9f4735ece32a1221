"""A prediction request's body read into columns, and its answer written as JSON or CSV.

Plain functions of bytes, a loaded version (``service.api.model_cache.Served``) and a few limits, with no
web framework: the prediction routes call them in the API process, and the processes that answer large
requests (``service.api.predict_lane``) call the same ones, so both give the same bytes.
"""

from __future__ import annotations

import csv
import io
import math
from typing import Any, NamedTuple

import orjson

from service import tables
from service.api import levels
from service.api.render import parse_json
from service.csvcells import number_cell, text_cell
from service.errors import InvalidData
from service.problems import UnsupportedMediaType

LIMITS = ("max_rows_per_request", "max_label_chars", "predict_memory_bytes")


def limits_of(settings: Any) -> dict[str, Any]:
    """The settings that reading and answering a prediction request use, as a plain (picklable) dict."""
    return {k: getattr(settings, k) for k in LIMITS}


class Ask(NamedTuple):
    """What a prediction request asks for besides its body: its media type (lower case, no parameters),
    its ``Accept`` header, the query's ``interval_level`` and (CSV bodies) its ``unseen_levels``."""

    media_type: str
    accept: str
    interval_level: float | None
    unseen_levels: str | None = None


def check_interval_level(value: Any, field: str) -> float | None:
    if value is None:
        return None
    if type(value) not in (int, float) or not math.isfinite(value) or not 0 < value < 1:
        raise InvalidData(
            f"{field} must be a number strictly between 0 and 1 (the interval level, e.g. 0.9), got {value!r}.",
            errors=[{"field": field, "value": value, "message": "expected 0 < interval_level < 1"}],
        )
    return float(value)


_BODY_FIELDS = frozenset({"rows", "interval_level", "unseen_levels"})


def parse_json_body(raw: bytes, limit: int, interval_level_q: float | None, max_label: int | None = tables.MAX_LABEL_CHARS
                     ) -> tuple[dict, float | None, int, str]:
    body = parse_json(raw)
    if not isinstance(body, dict):
        raise InvalidData(
            f"the body must be a JSON object {{\"rows\": [...], \"interval_level\": 0.9}}, got a {type(body).__name__}.",
            errors=[{"field": "body", "message": "expected an object"}],
        )
    extra = body.keys() - _BODY_FIELDS
    if extra:
        extra = sorted(extra)
        raise InvalidData(
            f"unknown field(s) {extra} in the body; only 'rows', 'interval_level' and 'unseen_levels' are read"
            + (" ('interval' is now called 'interval_level')." if "interval" in extra else "."),
            errors=[{"field": k, "message": "unknown field"} for k in extra],
        )
    if "rows" not in body:
        raise InvalidData("the body lacks 'rows', the list of input rows.", errors=[{"field": "rows", "message": "missing"}])
    interval_level = (check_interval_level(body.get("interval_level"), "interval_level") if "interval_level" in body
                      else interval_level_q)
    rows = body["rows"]
    if isinstance(rows, list):
        tables.check_row_limit(len(rows), limit, "max_rows_per_request", "rows")
    cols = tables.from_rows(rows, where="rows", max_label=max_label)
    return cols, interval_level, len(rows), levels.mode(body.get("unseen_levels"), "unseen_levels")


def read(served: Any, raw: bytes, ask: Ask, limits: dict[str, Any]) -> tuple[dict, float | None, int, str]:
    """The body's columns, the interval level, the row count and the unseen-levels mode. Raises
    ``InvalidData`` (a 422 problem) or ``UnsupportedMediaType`` naming what is wrong."""
    max_label = limits["max_label_chars"]
    if ask.media_type == "text/csv":
        labels = set(served.model.categories.names)  # read as text: a level "01" is not the number 1
        cols = tables.from_csv(raw, where="body", max_label=max_label, spec=labels)
        n = len(next(iter(cols.values())))
        tables.check_row_limit(n, limits["max_rows_per_request"], "max_rows_per_request", "the CSV body")
        return cols, ask.interval_level, n, levels.mode(ask.unseen_levels, "query.unseen_levels")
    if ask.media_type in ("", "application/json") or ask.media_type.endswith("+json"):
        return parse_json_body(raw, limits["max_rows_per_request"], ask.interval_level, max_label)
    raise UnsupportedMediaType(
        f"Content-Type {ask.media_type!r} is not read here; send application/json ({{\"rows\": [...]}}) or text/csv."
    )


def answer(served: Any, detail: dict[str, Any], interval_level: float | None, ask: Ask) -> tuple[bytes | str, str, dict]:
    """The answer's body, media type and headers: CSV when the caller accepts it (or sent CSV and did not ask
    for JSON), else JSON."""
    if "text/csv" in ask.accept or (ask.media_type == "text/csv" and "application/json" not in ask.accept):
        return csv_answer(detail, interval_level is not None), "text/csv", {
            "Tikhon-Model": served.name, "Tikhon-Model-Version": str(served.version)}
    return json_answer(served, detail, interval_level is not None), "application/json", {}


_NUMPY = orjson.OPT_SERIALIZE_NUMPY
SMALL_JSON_ROWS = 16  # up to this many rows the answer is written from Python objects (fewer calls than splicing)


def _numbers(column) -> list[bytes]:
    """A float column as JSON number texts (orjson writes numpy floats exactly as Python floats; a non-finite
    value becomes null, as it would from a list of floats)."""
    return orjson.dumps(column, option=_NUMPY)[1:-1].split(b",")


def json_answer(served: Any, detail: dict[str, Any], with_interval: bool) -> bytes:
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


def csv_answer(detail: dict[str, Any], with_interval: bool) -> str:
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
