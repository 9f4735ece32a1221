"""Reading request bodies and writing responses quickly (orjson), with problems for what cannot be read."""

from __future__ import annotations

from typing import Any

import orjson
from fastapi import Request
from fastapi.responses import Response

from service.problems import MalformedBody, UnsupportedMediaType

_OPTS = orjson.OPT_SERIALIZE_NUMPY | orjson.OPT_NON_STR_KEYS


def _default(value: Any) -> Any:
    if hasattr(value, "isoformat"):
        return value.isoformat()
    if hasattr(value, "tolist"):
        return value.tolist()
    raise TypeError(f"not JSON serializable: {type(value).__name__}")


def dumps(body: Any) -> bytes:
    return orjson.dumps(body, default=_default, option=_OPTS)


def json_response(body: Any, status: int = 200, headers: dict[str, str] | None = None) -> Response:
    return Response(dumps(body), status_code=status, media_type="application/json", headers=headers)


def media_type(request: Request) -> str:
    return request.headers.get("content-type", "").split(";", 1)[0].strip().lower()


def parse_json(raw: bytes, what: str = "request body") -> Any:
    if not raw.strip():
        raise MalformedBody(f"The {what} is empty; send a JSON object as documented at /docs.")
    try:
        return orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        raise MalformedBody(
            f"The {what} is not valid JSON ({exc}); send a JSON object as documented at /docs "
            "(NaN and Infinity are not JSON: send finite numbers).",
        ) from None


async def read_json(request: Request) -> Any:
    mt = media_type(request)
    if mt and mt != "application/json" and not mt.endswith("+json"):
        raise UnsupportedMediaType(
            f"Content-Type {mt!r} is not read by {request.method} {request.url.path}; send application/json."
        )
    return parse_json(await request.body())
