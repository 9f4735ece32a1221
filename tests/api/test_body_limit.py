"""The body limit at the ASGI level (``service.api.middleware.BodyLimit``): a body framed by a declared
Content-Length within the limit passes untouched; without one, or with Transfer-Encoding beside it (RFC 9112,
section 6.3: Transfer-Encoding overrides Content-Length), the bytes are counted and the limit holds."""

from __future__ import annotations

import asyncio

import orjson

from service.api.middleware import BodyLimit


async def _app(scope, receive, send):  # reads the whole body and answers its length
    size = 0
    while True:
        message = await receive()
        size += len(message.get("body", b""))
        if not message.get("more_body"):
            break
    payload = str(size).encode()
    await send({"type": "http.response.start", "status": 200, "headers": [(b"content-length", str(len(payload)).encode())]})
    await send({"type": "http.response.body", "body": payload})


def _call(headers: list[tuple[bytes, bytes]], chunks: list[bytes], limit: int = 10) -> tuple[int, bytes]:
    scope = {"type": "http", "method": "POST", "path": "/x", "headers": headers, "state": {}}
    pending = list(chunks)
    sent: list[dict] = []

    async def receive():
        chunk = pending.pop(0)
        return {"type": "http.request", "body": chunk, "more_body": bool(pending)}

    async def send(message):
        sent.append(message)

    asyncio.run(BodyLimit(_app, limit)(scope, receive, send))
    return sent[0]["status"], b"".join(m.get("body", b"") for m in sent[1:])


def test_a_declared_length_within_the_limit_passes():
    assert _call([(b"content-length", b"8")], [b"12345678"]) == (200, b"8")


def test_a_declared_length_above_the_limit_is_refused_before_reading():
    status, body = _call([(b"content-length", b"11")], [b"x" * 11])
    assert status == 413 and orjson.loads(body)["received"] == 11


def test_without_a_declared_length_the_bytes_are_counted():
    status, body = _call([], [b"x" * 6, b"x" * 6])
    assert status == 413 and orjson.loads(body)["allowed"] == 10
    assert _call([], [b"x" * 5, b"x" * 5]) == (200, b"10")


def test_transfer_encoding_beside_a_small_declared_length_is_still_counted():
    status, _ = _call([(b"content-length", b"4"), (b"transfer-encoding", b"chunked")], [b"x" * 6, b"x" * 6])
    assert status == 413


def test_an_unreadable_declared_length_is_counted():
    status, _ = _call([(b"content-length", b"four")], [b"x" * 6, b"x" * 6])
    assert status == 413
