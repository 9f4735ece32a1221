"""The two prediction routes, dispatched ahead of the framework's middleware stack.

A single-row prediction is tens of microseconds of work; walking FastAPI's own layers (server-error,
telemetry and body-size middleware, the exception middleware and exit stack), the router's match over
every route and the route's request handling (dependency solving, body checks) cost about as much again.
``PredictionsFirst`` sits ahead of the app's whole stack (``service.api.app.TikhonAPI``). For ``POST`` to a
path that one of the prediction routes matches (the route's own compiled pattern, tried in the router's
order, and these routes come first in it), it sets what the router would set (``route``, ``path_params``,
``endpoint``) and calls the route's endpoint directly, through the layers a POST meets in the app's stack
(``layers``: the request context with its id, JSON log line and metrics, the body limit and, when configured,
CORS; ``service.api.app``); an exception is answered by the handler the app registered for its type
(``service.api.exception_handlers.install``), as FastAPI's exception middleware would, and anything else by the
request context's last-resort 500. Anything else (another method, another path) goes to the app's stack
unchanged, so a ``GET`` still gets the router's 405 and the routes stay in ``/openapi.json`` as declared.

The endpoints called here must do all their own checking (``auth.authorize`` first, then the path
parameters): they are written that way (``service.api.routes.predictions``).
"""

from __future__ import annotations

from typing import Any, Awaitable, Callable

from fastapi.routing import APIRoute
from starlette.requests import Request

try:  # the path the router matches (without the root path); Starlette's helper where it has one
    from starlette._utils import get_route_path
except ImportError:  # older Starlette matched scope["path"] itself
    def get_route_path(scope: dict) -> str:
        return scope["path"]


class PredictionsFirst:
    """Answers the POST routes of ``router`` (included first in the app ``owner``) through ``layers(answer)``
    without going through ``owner``'s middleware stack or router; ``ahead_of(stack)`` is the ASGI app."""

    def __init__(self, *, owner: Any, router: Any, layers: Callable[[Any], Any]) -> None:
        self._owner = owner
        self._router = router
        self._layered = layers(self._answer)
        self._routes: list[tuple[Any, Any, dict]] | None = None
        self._handlers: dict | None = None

    def ahead_of(self, stack: Any) -> Callable[[dict, Any, Any], Awaitable[None]]:
        routes_first = self

        async def app(scope: dict, receive: Any, send: Any) -> None:
            if scope["type"] != "http" or scope["method"] != "POST":
                await stack(scope, receive, send)
                return
            if routes_first._routes is None:
                routes_first._resolve()
            path = get_route_path(scope)
            for route, pattern, convertors in routes_first._routes:
                match = pattern.match(path)
                if match is not None:
                    break
            else:
                await stack(scope, receive, send)
                return
            scope["path_params"] = {k: convertors[k].convert(v) for k, v in match.groupdict().items()}
            scope["route"] = route
            scope["endpoint"] = route.endpoint
            scope.setdefault("router", routes_first._owner.router)
            await routes_first._layered(scope, receive, send)

        return app

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

    async def _answer(self, scope: dict, receive: Any, send: Any) -> None:
        request = Request(scope, receive, send)
        try:
            response = await scope["endpoint"](request)
        except Exception as exc:
            handler = None
            for cls in type(exc).__mro__:
                handler = self._handlers.get(cls)
                if handler is not None:
                    break
            if handler is None:  # unexpected: the request context answers 500 and logs it
                raise
            response = await handler(request, exc)
        await response(scope, receive, send)
