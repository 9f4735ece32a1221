"""The two prediction routes, dispatched ahead of FastAPI's router.

A single-row prediction is a few hundred microseconds of work; walking FastAPI's exception and exit-stack
middleware, the router's match over every route and the route's request handling (dependency solving,
body checks) cost about as much again. ``PredictionsFirst`` is the innermost of the app's own middleware:
everything outside it (request id, JSON log line, metrics, body limit, the CORS preflight guard and CORS)
runs for these routes exactly as for every other one. For ``POST`` to a path that one of the prediction
routes matches (the route's own compiled pattern, tried in the router's order, and these routes come
first in it), it sets what the router would set (``route``, ``path_params``, ``endpoint``) and calls the
route's endpoint directly; an exception is answered by the handler the app registered for its type
(``service.api.exception_handlers.install``), as FastAPI's exception middleware would. Anything else (another
method, another path) goes on to FastAPI unchanged, so a ``GET`` still gets the router's 405 and the
routes stay in ``/openapi.json`` as declared.

The endpoints called here must do all their own checking (``auth.authorize`` first, then the path
parameters): they are written that way (``service.api.routes.predictions``).
"""

from __future__ import annotations

from typing import Any

from fastapi.routing import APIRoute
from starlette.requests import Request

try:  # the path the router matches (without the root path); Starlette's helper where it has one
    from starlette._utils import get_route_path
except ImportError:  # older Starlette matched scope["path"] itself
    def get_route_path(scope: dict) -> str:
        return scope["path"]


class PredictionsFirst:
    """ASGI middleware answering the POST routes of ``router`` (included first in the app ``owner``) without
    going through ``owner``'s router."""

    def __init__(self, app: Any, *, owner: Any, router: Any) -> None:
        self.app = app
        self._owner = owner
        self._router = router
        self._routes: list[tuple[Any, Any, dict]] | None = None
        self._handlers: dict | None = None

    def _resolve(self) -> None:
        """The router's POST routes with their patterns, and the app's exception handlers (read at the first
        request, when everything is registered)."""
        # Routes are matched in order: no other API route may come before these (FastAPI keeps an included
        # router as one entry; older versions copy its routes into the app's list).
        api = [getattr(r, "original_router", None) or r for r in self._owner.router.routes
               if isinstance(r, APIRoute) or hasattr(r, "original_router")]
        first = api[0] if api else None
        if not (first is self._router or (isinstance(first, APIRoute) and first.endpoint is self._router.routes[0].endpoint)):
            raise RuntimeError("the prediction routes must be included before any other API route (service.api.app)")
        self._routes = [(route, route.path_regex, route.param_convertors) for route in self._router.routes
                        if isinstance(route, APIRoute) and "POST" in route.methods]
        self._handlers = {k: v for k, v in self._owner.exception_handlers.items()
                          if isinstance(k, type) and k is not Exception}

    async def __call__(self, scope: dict, receive: Any, send: Any) -> None:
        if scope["type"] != "http" or scope["method"] != "POST":
            await self.app(scope, receive, send)
            return
        if self._routes is None:
            self._resolve()
        path = get_route_path(scope)
        for route, pattern, convertors in self._routes:
            match = pattern.match(path)
            if match is not None:
                break
        else:
            await self.app(scope, receive, send)
            return
        scope["path_params"] = {k: convertors[k].convert(v) for k, v in match.groupdict().items()}
        scope["route"] = route
        scope["endpoint"] = route.endpoint
        scope.setdefault("router", self._owner.router)
        request = Request(scope, receive, send)
        try:
            response = await route.endpoint(request)
        except Exception as exc:
            handler = None
            for cls in type(exc).__mro__:
                handler = self._handlers.get(cls)
                if handler is not None:
                    break
            if handler is None:  # unexpected: the request context middleware answers 500 and logs it
                raise
            response = await handler(request, exc)
        await response(scope, receive, send)
