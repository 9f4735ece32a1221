"""Pure ASGI middleware: request context (id, JSON log line, metrics, last-resort 500) and body limit.

Both are plain ASGI callables rather than ``BaseHTTPMiddleware`` subclasses: they add no task or
stream copy per request, and the body limit can count bytes as they arrive (a missing or lying
``Content-Length`` does not get past it).
"""

from __future__ import annotations

import itertools
import logging
import os
import re
import time
from typing import Any

import orjson

from service import logs
from service.problems import PROBLEM_MEDIA_TYPE, internal_error_body, problem_body
from service.api.stale import header_value

log = logging.getLogger("tikhon.api")
access = logging.getLogger("tikhon.api.access")

_SAFE_ID = re.compile(r"^[A-Za-z0-9._:-]{1,64}$")


async def _send_problem(send, body: dict[str, Any], extra_headers: list[tuple[bytes, bytes]] | None = None) -> None:
    payload = orjson.dumps(body)
    headers = [
        (b"content-type", PROBLEM_MEDIA_TYPE.encode()),
        (b"content-length", str(len(payload)).encode()),
        *(extra_headers or []),
    ]
    await send({"type": "http.response.start", "status": body["status"], "headers": headers})
    await send({"type": "http.response.body", "body": payload})


class RequestContext:
    """Gives each request an id (a caller's ``X-Request-Id`` when it is short and plain, else a new one),
    echoes it in the response, records Prometheus metrics per route template, writes one structured log
    line, and turns an exception that escaped everything else into a 500 problem without a traceback.

    Nothing from the request headers other than the request id is logged (keys never are).

    ``process_header``: also name the answering process (``X-Tikhon-Process: <pid>``), for a server
    running several API processes on one socket (``tikhon serve --workers N``)."""

    def __init__(self, app, metrics=None, process_header: bool = False):
        self.app = app
        self.metrics = metrics
        self._extra = [(b"x-tikhon-process", str(os.getpid()).encode())] if process_header else []
        # New request ids: 32 hex digits as before (a uuid4's), a random 64-bit prefix per app and a counter,
        # so making one costs no system call and no UUID object.
        self._id_prefix = os.urandom(8).hex()
        self._ids = itertools.count(int.from_bytes(os.urandom(4), "big"))

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        rid = None
        for k, v in scope.get("headers", ()):
            if k == b"x-request-id":
                text = v.decode("latin-1")
                if _SAFE_ID.match(text):
                    rid = text
                break
        if rid is None:
            rid = f"{self._id_prefix}{next(self._ids) & 0xFFFFFFFFFFFFFFFF:016x}"
        state = scope.setdefault("state", {})
        state["request_id"] = rid
        rid_header = (b"x-request-id", rid.encode())
        extra = self._extra
        status_box = [0]
        started = time.perf_counter()

        async def send_wrapper(message):
            if message["type"] == "http.response.start":
                status_box[0] = message["status"]
                message = dict(message)
                message["headers"] = [*message.get("headers", ()), rid_header, *extra]
                age = state.get("catalog_age")
                if age is not None:  # the answer rests on stale catalog knowledge (service.api.stale)
                    message["headers"].append((b"tikhon-catalog", header_value(age).encode()))
                    if self.metrics is not None:
                        self.metrics.stale_answers.inc()
            await send(message)

        try:
            await self.app(scope, receive, send_wrapper)
        except Exception:  # the last resort: log server-side, answer without any traceback
            log.exception("unhandled error", extra={"request_id": rid})
            if status_box[0] == 0:
                status_box[0] = 500
                await _send_problem(send, internal_error_body(scope.get("path"), rid), [rid_header, *extra])
        finally:
            elapsed = time.perf_counter() - started
            route = scope.get("route")
            template = getattr(route, "path", None) or "unmatched"
            status = status_box[0] or 500
            if self.metrics is not None:
                self.metrics.observe_request(scope["method"], template, status, elapsed)
            if access.isEnabledFor(logging.INFO):
                logs.line(access, logging.INFO, "request", {
                    "request_id": rid, "method": scope["method"], "path": scope.get("path"), "route": template,
                    "status": status, "duration_ms": round(elapsed * 1000, 3),
                    "client": (scope.get("client") or ("", 0))[0],
                })


class _TooLarge(Exception):
    pass


class BodyLimit:
    """Refuses a request body larger than ``limit`` bytes with a 413 problem that names the limit.

    A declared ``Content-Length`` above the limit is refused before anything is read; one within it (and no
    ``Transfer-Encoding``) frames the body, which the server then reads to exactly that length. Otherwise the
    bytes are counted as they arrive; at the first byte past the limit reading stops, and whatever the
    application was about to answer is replaced by the 413 (a handler that swallowed the read error and
    answered 400 does not hide the real reason)."""

    def __init__(self, app, limit: int, setting_name: str = "max_body_bytes"):
        self.app = app
        self.limit = limit
        self.setting_name = setting_name

    def _problem(self, scope, received: int | None) -> dict[str, Any]:
        got = f"{received} bytes" if received is not None else f"more than {self.limit} bytes"
        return problem_body(
            slug="limit-exceeded", title="Limit exceeded", status=413,
            detail=f"The request body is {got}, above the limit max_body_bytes={self.limit}; send a smaller body "
            "(split a large prediction batch, or drop a training file under TIKHON_DATA_DIR and pass it as "
            "'source'), or raise TIKHON_MAX_BODY_BYTES on the server.",
            instance=scope.get("path"), request_id=scope.get("state", {}).get("request_id"),
            limit=self.setting_name, allowed=self.limit, received=received,
        )

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = None
        chunked = False
        for k, v in scope.get("headers", ()):
            if k == b"content-length" and declared is None:
                try:
                    declared = int(v)
                except ValueError:
                    declared = -1
                if declared > self.limit:
                    await _send_problem(send, self._problem(scope, declared))
                    return
            elif k == b"transfer-encoding":
                chunked = True
        if declared is not None and declared >= 0 and not chunked:
            # A body framed by its Content-Length is exactly that many bytes: the server reads no more as this
            # request's body (RFC 9112, section 6.3), so a declared length within the limit needs no counting.
            await self.app(scope, receive, send)
            return

        count = [0]
        exceeded = [False]
        started = [False]

        async def receive_wrapper():
            message = await receive()
            if message["type"] == "http.request":
                count[0] += len(message.get("body", b""))
                if count[0] > self.limit:
                    exceeded[0] = True
                    raise _TooLarge()
            return message

        async def send_wrapper(message):
            if exceeded[0]:
                if message["type"] == "http.response.start" and not started[0]:
                    started[0] = True
                    await _send_problem(send, self._problem(scope, None))
                return  # drop whatever the app tried to send after the limit tripped
            if message["type"] == "http.response.start":
                started[0] = True
            await send(message)

        try:
            await self.app(scope, receive_wrapper, send_wrapper)
        except _TooLarge:
            if not started[0]:
                started[0] = True
                await _send_problem(send, self._problem(scope, None))
        except Exception:
            if exceeded[0]:
                if not started[0]:
                    started[0] = True
                    await _send_problem(send, self._problem(scope, None))
                return
            raise

