"""A browser's CORS preflight from an origin the server does not list gets a problem that says why.

Without this, a preflight (``OPTIONS`` with ``Origin`` and ``Access-Control-Request-Method``) from an
unlisted origin answers 405 (no CORS configured) or a bare 400 "Disallowed CORS origin" (Starlette's
CORS middleware), and the dashboard's author is left guessing. Here it answers 403
``application/problem+json`` naming the origin and the setting ``TIKHON_CORS_ORIGINS`` that allows it.
Listed origins pass through to the CORS middleware unchanged.
"""

from __future__ import annotations

from typing import Any

from service.api.exception_handlers import problem_response
from service.problems import problem_body


class PreflightGuard:
    def __init__(self, app: Any, *, allowed: list[str]):
        self.app = app
        self.allowed = frozenset(allowed)

    async def __call__(self, scope: dict, receive: Any, send: Any) -> None:
        if scope["type"] != "http" or scope["method"] != "OPTIONS":
            return await self.app(scope, receive, send)
        headers = {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope.get("headers") or ()}
        origin = headers.get("origin")
        if origin is None or "access-control-request-method" not in headers:
            return await self.app(scope, receive, send)
        if "*" in self.allowed or origin in self.allowed:
            return await self.app(scope, receive, send)
        listed = ", ".join(sorted(self.allowed)) if self.allowed else "none"
        body = problem_body(
            slug="cors-origin-not-allowed", title="Origin not allowed", status=403,
            detail=(f"a browser page at {origin} may not call this API: the server allows cross-origin calls only from "
                    f"the origins in TIKHON_CORS_ORIGINS (now: {listed}). Ask the operator to add {origin} to "
                    "TIKHON_CORS_ORIGINS (a JSON list, e.g. [\"https://dash.example\"]) and restart the server."),
            instance=scope.get("path"), field="Origin", value=origin,
        )
        response = problem_response(body, headers={"Vary": "Origin"})
        await response(scope, receive, send)
