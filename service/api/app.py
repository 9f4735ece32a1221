"""The app factory: ``create_app(settings, store=None) -> FastAPI``.

Nothing here reads the environment or opens anything at import time. ``create_app`` wires the
problem mapping, the middleware (request context outermost, then the body limit, then CORS), the
open routes (health, metrics, problem-type documentation) and the ``/v1`` routers, each of which is
guarded by the key check in ``service.api.auth``.
"""

from __future__ import annotations

from contextlib import asynccontextmanager
from typing import Any

from fastapi import Depends, FastAPI
from fastapi.middleware.cors import CORSMiddleware

from service import paths
from service import problems
from service.api import exception_handlers
from service.api import auth
from service.api.metrics import ApiMetrics
from service.api.middleware import BodyLimit, RequestContext
from service.api.schemas import component_schemas
from service.api.stale import CatalogWatch, LastKnown
from service.settings import Settings

API_VERSION = "1"


def create_app(settings: Settings, store: Any = None, *, on_shutdown=None, multiprocess_dir: str | None = None,
               process_header: bool = False) -> FastAPI:
    """Build the HTTP app. ``store`` defaults to ``service.store.Store(settings)``.

    ``on_shutdown``: optional callables run when the app's lifespan ends (the server uses it to stop an
    embedded worker). ``multiprocess_dir`` and ``process_header``: set by ``tikhon serve --workers N`` in
    each of its API processes (metrics summed over the processes; an ``X-Tikhon-Process`` header naming
    the process that answered)."""
    if store is None:
        from service.store import Store

        store = Store(settings)

    from service.api.model_cache import ModelCache
    from service.api.routes import health, models, pages, plots, predict, trainings

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        yield
        for fn in on_shutdown or ():
            fn()

    app = FastAPI(
        title="Tikhon",
        version=API_VERSION,
        summary="Tunes, versions and serves regularized regression models (ridge, lasso, elastic net).",
        description=(
            "Penalty strength and basis (linear, polynomial degree, RBF width) are chosen jointly by "
            "cross-validation. Predictions carry the exact version that produced them, CV+ intervals and "
            "extrapolation warnings. Errors are RFC 9457 problem details (application/problem+json)."
        ),
        openapi_url="/openapi.json",
        docs_url=None,  # served by routes.docs from packaged files (no CDN)
        redoc_url=None,
        lifespan=lifespan,
    )
    metrics = ApiMetrics(multiprocess_dir)
    app.state.settings = settings
    paths.register(settings)  # problem details name these folders' paths relative to them, never absolute
    app.state.store = store
    app.state.metrics = metrics
    # The catalog's last answers (keys, live versions), served for up to stale_ok_s while it is unavailable.
    last_known = LastKnown(settings.stale_ok_s, CatalogWatch())
    app.state.catalog_watch = last_known.watch
    app.state.gate = auth.KeyGate(store.keys, settings.auth_cache_s, last_known)
    app.state.models = ModelCache(store, settings, metrics, last_known)
    metrics.watch_jobs(store.jobs.counts)

    exception_handlers.install(app)

    # Every /v1 router is included with the key check; the routers carry the /v1 prefix themselves so
    # each route's template (used as the metrics label) is the full path. The prediction routes come first
    # (routes are matched in order, and they are the ones called thousands of times a second) and call the
    # same check, ``auth.authorize``, as their first statement instead of through a dependency, which
    # FastAPI would solve per request.
    app.include_router(predict.router)
    for router in (models.router, trainings.router, plots.router):
        app.include_router(router, dependencies=[Depends(auth.authorize)])
    from service.api.routes import admin  # API keys and pruning (admin scope)
    app.include_router(admin.router, dependencies=[Depends(auth.authorize)])
    app.include_router(health.router)
    app.include_router(pages.router)  # the HTML overview; checks keys itself (login form)
    from service.api.routes import docs  # /docs with its assets served from the package
    app.include_router(docs.router)

    # Starlette wraps in reverse order of addition: the last added is the outermost.
    if settings.cors_origins:
        app.add_middleware(
            CORSMiddleware, allow_origins=list(settings.cors_origins), allow_methods=["GET", "POST", "PUT", "DELETE"],
            allow_headers=["Authorization", "Content-Type", "Idempotency-Key", "X-Request-Id"],
            expose_headers=["Location", "X-Request-Id", "Retry-After", "Tikhon-Catalog"],
        )
    from service.api.cors import PreflightGuard  # an unlisted origin's preflight: a problem naming the setting
    app.add_middleware(PreflightGuard, allowed=list(settings.cors_origins))
    app.add_middleware(BodyLimit, limit=settings.max_body_bytes)
    app.add_middleware(RequestContext, metrics=metrics, process_header=process_header)

    _document_security(app)
    return app


def _document_security(app: FastAPI) -> None:
    """Add the bearer-key scheme to the OpenAPI components (routes already carry their requirements)."""
    original = app.openapi

    def openapi() -> dict:
        if app.openapi_schema:
            return app.openapi_schema
        schema = original()
        components = schema.setdefault("components", {})
        components.setdefault("securitySchemes", {})[auth.SCHEME] = auth.SECURITY_SCHEME
        for key, value in component_schemas().items():
            components.setdefault("schemas", {}).setdefault(key, value)
        _document_problems(schema)
        app.openapi_schema = schema
        return schema

    app.openapi = openapi  # type: ignore[method-assign]


# RFC 9457 section 3.1 members, plus the extensions this service adds (request_id, errors, limit...).
PROBLEM_SCHEMA = {
    "type": "object",
    "description": "RFC 9457 problem details. Extension members (request_id, errors, limit, allowed, received, "
    "checks) appear where they apply.",
    "required": ["type", "title", "status", "detail"],
    "properties": {
        "type": {"type": "string", "format": "uri-reference", "description": "Problem type; GET it for a description."},
        "title": {"type": "string"},
        "status": {"type": "integer", "minimum": 400, "maximum": 599},
        "detail": {"type": "string", "description": "What is wrong and how to fix it."},
        "instance": {"type": "string", "format": "uri-reference"},
        "request_id": {"type": "string"},
        "errors": {"type": "array", "items": {"type": "object"}, "description": "Field-level problems."},
    },
    "additionalProperties": True,
}


def _document_problems(schema: dict) -> None:
    """Document the error answers every operation can give: 4XX and 5XX problem details (OpenAPI 3.1 allows
    the range keys), and the 422 of request validation as the problem it is rather than FastAPI's default
    validation-error shape, which this service never sends (exception_handlers.install renders it as a problem)."""
    schemas = schema.setdefault("components", {}).setdefault("schemas", {})
    schemas["Problem"] = PROBLEM_SCHEMA
    ref = {"$ref": "#/components/schemas/Problem"}
    content = {problems.PROBLEM_MEDIA_TYPE: {"schema": ref}}
    for item in schema.get("paths", {}).values():
        for method, op in item.items():
            if method not in ("get", "put", "post", "delete", "patch", "head", "options"):
                continue
            responses = op.setdefault("responses", {})
            if "422" in responses:
                responses["422"] = {"description": "A field of the request is invalid (problem details).", "content": content}
            responses.setdefault("4XX", {"description": "The request was refused (problem details).", "content": content})
            responses.setdefault("5XX", {"description": "The server failed (problem details).", "content": content})
    for unused in ("HTTPValidationError", "ValidationError"):
        schemas.pop(unused, None)
