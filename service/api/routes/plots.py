"""Figures of a version (CV error, regularization path, residuals) and of a model's history, as SVG or PNG.

Thin routes: they read the verified manifest and arrays from the store and hand them to
``service.api.rendering.figures``. Versions are immutable, so a rendered figure is kept in memory under
(name, version, manifest checksum, kind, format) and served again with an ``ETag``; the history figure
is keyed by the model's versions, their checksums and its live-version history.
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from typing import Any, Callable

from fastapi import APIRouter, Path, Query, Request
from fastapi.responses import Response

from service.api import answers as A, auth
from service.api.rendering import figure_data
from service.api.rendering import figures as plots
from service.api.render import json_response
from service.errors import InvalidData, NotFound
from service.api.dependencies import ModelName, StoreDep
from service.store.schema import VERSION_MAX

router = APIRouter(prefix="/v1", tags=["plots"])

VersionPath = Path(..., ge=1, le=VERSION_MAX, description="Version number (1, 2, ...).")
# Read as text (check_format names the allowed values in its own message); documented as the PlotFormat enum
# (service.api.app replaces the parameter's schema by a reference to it).
FormatQuery = Query("svg", description="Image format: 'svg' (default, text kept as text) or 'png'.",
                    json_schema_extra={"enum": list(plots.FORMATS)})

_BINARY = {"type": "string", "format": "binary"}
_IMAGE_RESPONSES = {
    200: {"description": "The figure; with 'Accept: application/json' (and no 'format' parameter) the plotted "
          "series as JSON instead.", "model": A.FigureData,
          "content": {"image/svg+xml": {"schema": _BINARY}, "image/png": {"schema": _BINARY}}},
    304: {"description": "Not modified (the ETag in If-None-Match still matches)."},
}


class PlotCache:
    """Rendered figures by key, least recently used dropped first once ``max_bytes`` is exceeded."""

    def __init__(self, max_bytes: int = 64 * 2**20):
        self.max_bytes = max_bytes
        self._items: OrderedDict[tuple, bytes] = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()
        self.hits = 0
        self.misses = 0

    def get_or_render(self, key: tuple, make: Callable[[], bytes]) -> bytes:
        with self._lock:
            hit = self._items.get(key)
            if hit is not None:
                self._items.move_to_end(key)
                self.hits += 1
                return hit
            self.misses += 1
        data = make()  # outside the lock: rendering takes a while and two renders of one key agree
        with self._lock:
            if key not in self._items:
                self._items[key] = data
                self._bytes += len(data)
            while self._bytes > self.max_bytes and len(self._items) > 1:
                _, old = self._items.popitem(last=False)
                self._bytes -= len(old)
        return data


_cache_lock = threading.Lock()
# One figure is built and rendered at a time per process. Each request has its own Figure (no pyplot
# state), but text layout shares font caches; under the GIL a second concurrent render would not finish
# any sooner, so serializing costs nothing and removes any doubt.
_render_lock = threading.Lock()


def _serialized(make: Callable[[], bytes]) -> Callable[[], bytes]:
    def run() -> bytes:
        with _render_lock:
            return make()

    return run


def plot_cache(app: Any) -> PlotCache:
    """The app's figure cache (made on first use)."""
    cache = getattr(app.state, "plot_cache", None)
    if cache is None:
        with _cache_lock:
            cache = getattr(app.state, "plot_cache", None)
            if cache is None:
                cache = app.state.plot_cache = PlotCache()
    return cache


def check_format(fmt: str) -> str:
    value = (fmt or "").strip().lower()
    if value not in plots.FORMATS:
        raise InvalidData(
            f"query parameter 'format' is {fmt!r}, which is not offered; use format=svg (the default) or format=png.",
            errors=[{"field": "query.format", "value": fmt, "message": "must be one of: svg, png"}],
            allowed=list(plots.FORMATS), field="format", received=fmt,
        )
    return value


def _image(request: Request, data: bytes, fmt: str, etag: str, cache_control: str) -> Response:
    headers = {"ETag": etag, "Cache-Control": cache_control, "X-Content-Type-Options": "nosniff"}
    match = request.headers.get("if-none-match")
    if match and etag in [m.strip() for m in match.split(",")]:
        return Response(status_code=304, headers=headers)
    if fmt == "svg":
        # An SVG opened on its own must not run anything, even if a label ever carried markup.
        headers["Content-Security-Policy"] = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"
    return Response(data, media_type=plots.MEDIA_TYPES[fmt], headers=headers)


def _arrays(store, name: str, version: int, manifest: dict[str, Any]) -> dict[str, Any]:
    from service.store import artifact

    arrays, _ = artifact.read_arrays(store.root / name / str(version), manifest, name=name, version=version)
    return arrays


def wants_json(request: Request) -> bool:
    """The caller asked for the plotted numbers (``Accept: application/json``) and named no image format."""
    return "application/json" in request.headers.get("accept", "") and "format" not in request.query_params


def _version_data(request: Request, name: str, version: int, kind: str) -> Response:
    store = request.app.state.store
    store.get_version(name, version)  # NotFound for an unknown or deleted version
    manifest = store.get_manifest(name, version)
    body = plots.engine_body(manifest)
    if not body.get("cv_table"):
        raise NotFound(f"version {version} of model {name!r} has no CV table (it was not published by a training "
                       "job); the figures and their numbers exist only for trained versions.")
    if kind == "cv":
        out = figure_data.cv_data(name, version, body)
    elif kind == "path":
        arrays = _arrays(store, name, version, manifest)
        out = figure_data.path_data(name, version, body, arrays["path_strengths"], arrays["path_coefficients"],
                                    arrays.get("path_df"))
    else:
        arrays = _arrays(store, name, version, manifest)
        if "oof_predicted" not in arrays:
            raise NotFound(f"version {version} of model {name!r} stores no out-of-fold predictions; retrain it to "
                           "get the residuals.")
        out = figure_data.residuals_data(name, version, body, arrays["oof_predicted"], arrays["oof_observed"])
    return A.reply(A.FigureData, out, headers={"Cache-Control": "private, max-age=86400", "Vary": "Accept"})


def _version_plot(request: Request, name: str, version: int, kind: str, fmt: str) -> Response:
    if wants_json(request):
        return _version_data(request, name, version, kind)
    fmt = check_format(fmt)
    store = request.app.state.store
    row = store.get_version(name, version)  # NotFound for an unknown or deleted version
    checksum = str(row.get("checksum"))

    def make() -> bytes:
        manifest = store.get_manifest(name, version)
        body = plots.engine_body(manifest)
        if not body.get("cv_table"):
            raise NotFound(f"version {version} of model {name!r} has no CV table to draw (it was not published "
                           "by a training job); the figures exist only for trained versions.")
        chosen = plots.chosen_text(body.get("chosen"))
        heading = ""
        if kind == "cv":
            fig = plots.cv_figure(body, heading=f"{name} v{version}: cross-validated error against penalty strength")
            title = f"{name} version {version}: CV error against penalty strength"
        elif kind == "path":
            arrays = _arrays(store, name, version, manifest)
            fig = plots.path_figure(body, arrays["path_strengths"], arrays["path_coefficients"],
                                    df=arrays.get("path_df"), heading=heading)
            title = f"{name} version {version}: regularization path"
        else:
            arrays = _arrays(store, name, version, manifest)
            if "oof_predicted" not in arrays:
                raise NotFound(f"version {version} of model {name!r} stores no out-of-fold predictions; "
                               "retrain it to get the residual figure.")
            fig = plots.residuals_figure(body, arrays["oof_predicted"], arrays["oof_observed"])
            title = f"{name} version {version}: out-of-fold residuals"
        return plots.render(fig, fmt, title=title, description=f"Chosen: {chosen}.")

    data = plot_cache(request.app).get_or_render((name, version, checksum, kind, fmt), _serialized(make))
    etag = f'"{checksum[:24]}-{kind}-{fmt}"'
    return _image(request, data, fmt, etag, "private, max-age=86400")


@router.get("/models/{name}/versions/{version}/plots/cv", summary="Figure: CV error against penalty strength",
            operation_id="plotCv",
            response_class=Response, responses=_IMAGE_RESPONSES, **auth.READ)
def plot_cv(request: Request, name: ModelName, version: int = VersionPath, format: str = FormatQuery) -> Response:
    """One line per basis setting (and l1 ratio for the elastic net), ±1 standard error bands, the chosen
    point ringed and the one-standard-error choice marked when it differs."""
    return _version_plot(request, name, version, "cv", format)


@router.get("/models/{name}/versions/{version}/plots/path", summary="Figure: regularization path of the chosen setting",
            operation_id="plotPath",
            response_class=Response, responses=_IMAGE_RESPONSES, **auth.READ)
def plot_path(request: Request, name: ModelName, version: int = VersionPath, format: str = FormatQuery) -> Response:
    """Coefficients of the standardized terms against penalty strength; the chosen strength is marked and the
    largest terms at it are named."""
    return _version_plot(request, name, version, "path", format)


@router.get("/models/{name}/versions/{version}/plots/residuals", summary="Figure: out-of-fold residuals",
            operation_id="plotResiduals",
            response_class=Response, responses=_IMAGE_RESPONSES, **auth.READ)
def plot_residuals(request: Request, name: ModelName, version: int = VersionPath,
                   format: str = FormatQuery) -> Response:
    """Out-of-fold predicted against observed, and residual against predicted with its mean per tenth."""
    return _version_plot(request, name, version, "residuals", format)


@router.get("/models/{name}/plots/history", summary="Figure: CV error and chosen settings of every version",
            operation_id="plotHistory",
            response_class=Response, responses=_IMAGE_RESPONSES, **auth.READ)
def plot_history(request: Request, store: StoreDep, name: ModelName, format: str = FormatQuery) -> Response:
    """Every version over time: the CV error of its chosen point (±1 SE) and its chosen strength and basis;
    the live version ringed, versions that were ever live filled."""
    fmt = check_format(format) if not wants_json(request) else "svg"
    versions = store.list_versions(name)  # NotFound for an unknown model
    history = store.history(name)
    live = next((v["version"] for v in versions if v.get("live")), None)
    promoted = sorted({h["to_version"] for h in history if h.get("to_version") is not None})
    if wants_json(request):
        return A.reply(A.FigureData, figure_data.history_data(name, versions, live, promoted),
                             headers={"Cache-Control": "private, no-cache", "Vary": "Accept"})
    state = repr(([(v["version"], v.get("checksum")) for v in versions], live, promoted)).encode()
    digest = hashlib.sha256(state).hexdigest()[:24]

    def make() -> bytes:
        fig = plots.history_figure(name, versions, live, promoted)
        lines = [f"v{v['version']}: {plots.chosen_text((v.get('summary') or {}).get('chosen'))}" for v in versions]
        return plots.render(fig, fmt, title=f"{name}: history of versions (live: {live or 'none'})",
                            description="; ".join(lines) or "no versions")

    data = plot_cache(request.app).get_or_render((name, "history", digest, fmt), _serialized(make))
    return _image(request, data, fmt, f'"{digest}-history-{fmt}"', "private, no-cache")
