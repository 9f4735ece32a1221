"""The app factory: ``create_app(settings, store=None) -> FastAPI``.

Nothing here reads the environment or opens anything at import time. ``create_app`` wires the
problem mapping, the middleware (request context outermost, then the body limit, then CORS; the POST
prediction routes are dispatched ahead of the framework's stack through the same layers, ``TikhonAPI``), the
open routes (health, metrics, problem-type documentation) and the ``/v1`` routers, each of which is
guarded by the key check in ``service.api.auth``.
"""

from __future__ import annotations

import inspect
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

# FastAPI's built-in OpenTelemetry hooks (recent versions) ask on every request whether a tracer, meter or
# logger provider is configured; this service reports through its own Prometheus metrics and JSON logs and
# configures none, so they are switched off rather than asked thousands of times a second.
_NO_OTEL = ({"telemetry": {"tracing": False, "metrics": False, "logs": False}}
            if "telemetry" in inspect.signature(FastAPI.__init__).parameters else {})


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

    from service.api.intake_process import IntakePool
    from service.api.model_cache import ModelCache
    from service.api import predict_io
    from service.api.predict_lane import PredictLane
    from service.api.routes import health, models, pages, plots, predictions, trainings

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        app.state.monitor.start()
        yield
        app.state.monitor.close()  # writes the last counts
        app.state.intake.close()
        app.state.predict_lane.close()
        for fn in on_shutdown or ():
            fn()

    app = TikhonAPI(
        title="Tikhon",
        version=API_VERSION,
        summary="Tunes, versions and serves regularized regression models (ridge, lasso, elastic net).",
        description=(
            "Penalty strength and basis (linear, polynomial degree, RBF width) are chosen jointly by "
            "cross-validation. Predictions carry the exact version that produced them, CV+ intervals and "
            "extrapolation warnings. Errors are RFC 9457 problem details (application/problem+json)."
        ),
        openapi_url="/openapi.json",
        # Operation ids are our own (each route names its operation_id; a route that does not gets the
        # camelCase of its function name, never the framework's path-and-method mangle).
        generate_unique_id_function=operation_id_of,
        separate_input_output_schemas=False,
        docs_url=None,  # served by routes.docs from packaged files (no CDN)
        redoc_url=None,
        lifespan=lifespan,
        **_NO_OTEL,
    )
    metrics = ApiMetrics(multiprocess_dir)
    app.state.settings = settings
    paths.register(settings)  # problem details name these folders' paths relative to them, never absolute
    app.state.store = store
    app.state.intake = IntakePool(settings.intake_processes)  # large JSON training bodies are read there
    app.state.predict_limits = predict_io.limits_of(settings)  # read once: settings do not change while serving
    app.state.predict_lane = PredictLane(settings.predict_processes, settings.predict_process_bytes,
                                         cache_models=settings.cache_models, cache_bytes=settings.cache_bytes)
    app.state.metrics = metrics
    # The catalog's last answers (keys, live versions), served for up to stale_ok_s while it is unavailable.
    last_known = LastKnown(settings.stale_ok_s, CatalogWatch())
    app.state.catalog_watch = last_known.watch
    app.state.gate = auth.KeyGate(store.keys, settings.auth_cache_s, last_known)
    app.state.models = ModelCache(store, settings, metrics, last_known)
    from service.api.monitor import Monitor
    from service.store.monitor import MonitorSums

    app.state.monitor = Monitor(MonitorSums(store.db), enabled=settings.monitor, flush_s=settings.monitor_flush_s,
                                retention_days=settings.monitor_retention_days)
    metrics.watch_jobs(store.jobs.counts)

    exception_handlers.install(app)

    # Every /v1 router is included with the key check; the routers carry the /v1 prefix themselves so
    # each route's template (used as the metrics label) is the full path. The prediction routes come first
    # (routes are matched in order, and they are the ones called thousands of times a second) and call the
    # same check, ``auth.authorize``, as their first statement instead of through a dependency, which
    # FastAPI would solve per request.
    app.include_router(predictions.router)
    from service.api.routes import monitoring

    for router in (models.router, trainings.router, plots.router, monitoring.router):
        app.include_router(router, dependencies=[Depends(auth.authorize)])
    from service.api.routes import admin  # API keys and pruning (admin scope)
    app.include_router(admin.router, dependencies=[Depends(auth.authorize)])
    app.include_router(health.router)
    app.include_router(pages.router)  # the HTML overview; checks keys itself (login form)
    from service.api.routes import docs  # /docs with its assets served from the package
    app.include_router(docs.router)

    # Starlette wraps in reverse order of addition: the last added is the outermost.
    cors = _cors_options(settings)
    if cors:
        app.add_middleware(CORSMiddleware, **cors)
    from service.api.cors import PreflightGuard  # an unlisted origin's preflight: a problem naming the setting
    app.add_middleware(PreflightGuard, allowed=list(settings.cors_origins))
    app.add_middleware(BodyLimit, limit=settings.max_body_bytes)
    app.add_middleware(RequestContext, metrics=metrics, process_header=process_header)

    # The POST prediction routes are dispatched ahead of the framework's own stack (service.api.fastpath), through
    # the same layers a POST meets there: request context, body limit and (when configured) CORS. The preflight
    # guard answers OPTIONS only, so it has nothing to do for them.
    from service.api.fastpath import PredictionsFirst

    def prediction_layers(answer):
        inner = CORSMiddleware(answer, **cors) if cors else answer
        return RequestContext(BodyLimit(inner, limit=settings.max_body_bytes), metrics=metrics,
                              process_header=process_header)

    app.state.predictions_first = PredictionsFirst(owner=app, router=predictions.router, layers=prediction_layers)

    _document_security(app)
    return app


def _cors_options(settings: Settings) -> dict[str, Any]:
    """CORSMiddleware's options for the configured origins (empty: no CORS)."""
    if not settings.cors_origins:
        return {}
    return dict(allow_origins=list(settings.cors_origins), allow_methods=["GET", "POST", "PUT", "DELETE"],
                allow_headers=["Authorization", "Content-Type", "Idempotency-Key", "X-Request-Id"],
                expose_headers=["Location", "X-Request-Id", "Retry-After", "Tikhon-Catalog", "Tikhon-Replayed",
                                "Tikhon-Model", "Tikhon-Model-Version"])


class TikhonAPI(FastAPI):
    """FastAPI with the prediction routes' dispatcher (``state.predictions_first``) ahead of its middleware stack."""

    def build_middleware_stack(self):
        stack = super().build_middleware_stack()
        first = getattr(self.state, "predictions_first", None)
        return stack if first is None else first.ahead_of(stack)


def operation_id_of(route: Any) -> str:
    """The fallback operation id of a route that names none: its function name in camelCase."""
    head, *rest = route.name.split("_")
    return head + "".join(part.capitalize() for part in rest)


def _document_security(app: FastAPI) -> None:
    """Finish the OpenAPI document: the bearer-key scheme, the request and enum schemas the routes refer to
    by name, the problem answers, and the key requirement made optional while the server is open.

    Two documents are kept. Once an API key exists, every ``/v1`` operation (and ``/metrics``) requires the
    bearer scheme with one of its scopes, as the server does. While no key exists every route is open (and
    the server listens on loopback only), so the operations carry no requirement and a generated client
    may call them without a token. In both, ``x-tikhon-scopes`` lists the scopes an operation accepts
    once keys exist."""
    original = app.openapi
    cache: dict[bool, dict] = {}

    def openapi() -> dict:
        open_now = not app.state.gate.closed and not _any_key(app)
        if open_now in cache:
            return cache[open_now]
        schema = original()
        app.openapi_schema = None  # FastAPI caches its own part; each variant is built from a fresh copy
        components = schema.setdefault("components", {})
        components.setdefault("securitySchemes", {})[auth.SCHEME] = auth.SECURITY_SCHEME
        for key, value in component_schemas().items():
            components.setdefault("schemas", {}).setdefault(key, value)
        _document_problems(schema)
        _name_parameter_enums(schema)
        for item in schema.get("paths", {}).values():
            for op in item.values():
                if isinstance(op, dict) and op.get("security"):
                    op["x-tikhon-scopes"] = [s for req in op["security"] for s in req.get(auth.SCHEME, [])]
                    if open_now:
                        del op["security"]
        cache[open_now] = schema
        return schema

    app.openapi = openapi  # type: ignore[method-assign]


def _any_key(app: FastAPI) -> bool:
    try:
        return bool(app.state.store.keys.any_active())
    except Exception:  # the catalog is unavailable: document what a keyed server needs
        return True


def _name_parameter_enums(schema: dict) -> None:
    """Parameters read as text by their routes (for their own error messages) refer to their named enum."""
    named = {"format": "PlotFormat", "unseen_levels": "UnseenLevels"}
    for item in schema.get("paths", {}).values():
        for op in item.values():
            for param in (op.get("parameters") or []) if isinstance(op, dict) else []:
                name = named.get(param.get("name"))
                if name and param.get("in") == "query":
                    default = (param.get("schema") or {}).get("default")
                    param["schema"] = {"$ref": f"#/components/schemas/{name}",
                                       **({"default": default} if default is not None else {})}


def _problem_schema() -> dict:
    from service.api.answers import Problem

    schema = Problem.model_json_schema(ref_template="#/components/schemas/{model}")
    return schema


def _document_problems(schema: dict) -> None:
    """Document the error answers every operation can give: 4XX and 5XX problem details (OpenAPI 3.1 allows
    the range keys), and the 422 of request validation as the problem it is rather than FastAPI's default
    validation-error shape, which this service never sends (exception_handlers.install renders it as a problem)."""
    schemas = schema.setdefault("components", {}).setdefault("schemas", {})
    problem = _problem_schema()
    schemas.update(problem.pop("$defs", {}))
    schemas["Problem"] = problem
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
