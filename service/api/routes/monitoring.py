"""After training: input drift of served rows and real-world error of scored outcomes, per model version.

Thin routes over ``service.api.monitor`` (counting, reports) and ``service.store.monitor`` (the catalog's
hourly sums, added over every server process).
"""

from __future__ import annotations

import time
from typing import Any

from anyio import to_thread
from fastapi import APIRouter, Path, Query, Request
from fastapi.responses import Response

from service import tables
from service.api import answers as A, auth, monitor
from service.api.render import parse_json
from service.errors import InvalidData
from service.store.monitor import HOUR, bucket_of
from service.api.dependencies import ModelName
from service.store.schema import VERSION_MAX

router = APIRouter(prefix="/v1", tags=["monitoring"])

VersionQuery = Query(None, ge=1, le=VERSION_MAX, description="Version to report on (default: the live version).")
SinceQuery = Query(None, description="Start: an ISO 8601 time or a span back from now (90m, 36h, 7d). "
                   "Default: when the version was created.")
UntilQuery = Query(None, description="End: an ISO 8601 time or a span back from now. Default: now.")


def _window(request: Request, name: str, version: int, since: str | None, until: str | None) -> tuple[float, float]:
    store = request.app.state.store
    row = store.get_version(name, version)  # NotFound for an unknown or deleted version
    created = row.get("created_at")
    start = created.timestamp() if hasattr(created, "timestamp") else time.time() - 30 * 24 * HOUR
    t0 = monitor.parse_time(since, "since", start)
    t1 = monitor.parse_time(until, "until", time.time())
    if t1 < t0:
        raise InvalidData(f"until ({monitor.iso(t1)}) is before since ({monitor.iso(t0)}); swap them",
                          errors=[{"field": "until", "value": until, "message": "before since"}])
    return t0, t1


def _version(request: Request, name: str, version: int | None) -> int:
    if version is not None:
        return int(version)
    return int(request.app.state.models.live_version(name))


def _counts(request: Request, name: str, version: int, kind: str, t0: float, t1: float) -> dict[int, dict[str, Any]]:
    mon: monitor.Monitor = request.app.state.monitor
    mon.flush()  # this process's latest counts first, so a reader sees its own writes
    return mon.sums.read(name, version, kind, bucket_of(t0), bucket_of(t1))


def _report(request: Request, name: str, version: int | None, since: str | None, until: str | None,
            kind: str) -> dict[str, Any]:
    """The ``inputs`` or ``outcomes`` report of a version (default: live) over a window."""
    v = _version(request, name, version)
    t0, t1 = _window(request, name, v, since, until)
    body = request.app.state.store.get_manifest(name, v, cv_table=False).get("training") or {}
    counts = _counts(request, name, v, kind, t0, t1)
    if kind == "inputs":
        return monitor.inputs_report(name, v, body.get("drift_reference"), counts, t0, t1)
    return monitor.outcomes_report(name, v, body.get("chosen") or {}, counts, t0, t1)


@router.get("/models/{name}/inputs", summary="Input drift: recent inputs against the training distribution",
            operation_id="getInputs", responses=A.document(A.InputsReport, "PSI per input, rows outside the training range."),
            **auth.READ)
def get_inputs(request: Request, name: ModelName, version: int | None = VersionQuery,
               since: str | None = SinceQuery, until: str | None = UntilQuery) -> Response:
    return A.reply(A.InputsReport, _report(request, name, version, since, until, "inputs"))


@router.get("/models/{name}/outcomes", summary="Real-world error of scored outcomes against the CV error",
            operation_id="getOutcomes", responses=A.document(A.OutcomesReport, "RMSE, MAE and 0.9 coverage, overall and per hour."),
            **auth.READ)
def get_outcomes(request: Request, name: ModelName, version: int | None = VersionQuery,
                 since: str | None = SinceQuery, until: str | None = UntilQuery) -> Response:
    return A.reply(A.OutcomesReport, _report(request, name, version, since, until, "outcomes"))


@router.post("/models/{name}/outcomes", status_code=202, summary="Score a version on rows whose true values are known",
             operation_id="addOutcomes", responses=A.document(A.OutcomesAccepted, "The rows were scored and counted.", 202),
             openapi_extra={**auth.PREDICT["openapi_extra"], "requestBody": {"required": True, "content": {"application/json": {"schema": {
                 "type": "object", "required": ["rows"], "additionalProperties": False,
                 "properties": {"rows": {"type": "array", "items": {"type": "object"},
                                         "description": "Input rows with the target column's true value."},
                                "version": {"type": "integer", "minimum": 1,
                                            "description": "Version to score (default: the live version)."}}}}}}})
async def post_outcomes(request: Request, name: ModelName) -> Response:
    settings = request.app.state.settings
    raw = await request.body()
    body = parse_json(raw)
    if not isinstance(body, dict):
        raise InvalidData(f"the body must be a JSON object {{\"rows\": [...], \"version\": 3}}, got a {type(body).__name__}.",
                          errors=[{"field": "body", "message": "expected an object"}])
    extra = sorted(set(body) - {"rows", "version"})
    if extra:
        raise InvalidData(f"unknown field(s) {extra} in the body; only 'rows' and 'version' are read.",
                          errors=[{"field": k, "message": "unknown field"} for k in extra])
    if "rows" not in body or not isinstance(body["rows"], list):
        raise InvalidData("the body lacks 'rows', the list of input rows with their true target values.",
                          errors=[{"field": "rows", "message": "missing"}])
    version = body.get("version")
    if version is not None and (type(version) is not int or not 1 <= version <= VERSION_MAX):
        raise InvalidData(f"version must be a whole number from 1, got {version!r}",
                          errors=[{"field": "version", "value": version, "message": "expected a version number"}])
    tables.check_row_limit(len(body["rows"]), settings.max_rows_per_request, "max_rows_per_request", "rows")
    cols = tables.from_rows(body["rows"], where="rows", max_label=settings.max_label_chars)
    cache = request.app.state.models
    v = int(version) if version is not None else int(cache.live_version(name))
    served = cache.cached(name, v) or await cache.lookups.run(("load", name, v), cache.load, name, v)
    target = served.model.target
    if target not in cols:
        raise InvalidData(f"the rows lack the target column {target!r}; outcomes are inputs with their true value",
                          errors=[{"field": target, "message": "missing column"}])
    from service.engine.table import numeric_column

    observed = numeric_column(cols, target, "target")

    def score() -> dict[str, Any]:
        detail = served.model.predict_detail(cols, interval_level=0.9, memory_bytes=settings.predict_memory_bytes)
        return request.app.state.monitor.outcome(served, observed, detail)

    counts = await to_thread.run_sync(score)
    return A.reply(A.OutcomesAccepted, {"model": name, "version": v, "accepted": counts["rows"],
                                        "skipped": len(body["rows"]) - counts["rows"]}, status=202)


# ---- figures (each answers its numbers as JSON under Accept: application/json) -------------------------
_FIGURE_RESPONSES = {200: {"description": "The figure; with 'Accept: application/json' (and no 'format' parameter) "
                           "the plotted numbers as JSON instead.", "model": A.MonitoringFigureData,
                           "content": {"image/svg+xml": {"schema": {"type": "string", "format": "binary"}},
                                       "image/png": {"schema": {"type": "string", "format": "binary"}}}}}


def _figure(request: Request, name: str, version: int | None, since: str | None, until: str | None, kind: str,
            fmt: str) -> Response:
    from service.api.rendering import figures as plots
    from service.api.rendering import monitor_figures as monitor_plots
    from service.api.routes.plots import _image, _serialized, check_format, wants_json

    report = _report(request, name, version, since, until, "outcomes" if kind == "error" else "inputs")
    v = report["version"]
    if kind == "error":
        data = {k: report[k] for k in ("model", "version", "from", "to", "rows", "cv", "series")}
    else:
        keys = ("features",) if kind == "drift" else ("series", "outside_range_rows")
        data = {k: report.get(k) for k in ("model", "version", "from", "to", "rows") + keys}
    if wants_json(request):
        return A.reply(A.MonitoringFigureData, data, headers={"Cache-Control": "private, no-cache", "Vary": "Accept"})
    fmt = check_format(fmt)
    draw = {"drift": monitor_plots.drift_figure, "outside": monitor_plots.outside_figure,
            "error": monitor_plots.error_figure}[kind]
    titles = {"drift": "input drift: training against recent shares", "outside": "rows outside the training range",
              "error": "real error against the CV error"}
    png_or_svg = _serialized(lambda: plots.render(draw(report), fmt, title=f"{name} v{v}: {titles[kind]}",
                                                  description=f"{report['rows']} rows from {report['from']} to {report['to']}"))()
    return _image(request, png_or_svg, fmt, f'"{kind}-{v}-{report["to"]}"', "private, no-cache")


from service.api.routes.plots import FormatQuery  # noqa: E402  (the PlotFormat parameter of every figure)


@router.get("/models/{name}/plots/drift", operation_id="plotDrift", summary="Figure: each input's training against recent shares, with PSI",
            response_class=Response, responses=_FIGURE_RESPONSES, **auth.READ)
def plot_drift(request: Request, name: ModelName, version: int | None = VersionQuery, since: str | None = SinceQuery,
               until: str | None = UntilQuery, format: str = FormatQuery) -> Response:
    return _figure(request, name, version, since, until, "drift", format)


@router.get("/models/{name}/plots/outside-range", operation_id="plotOutsideRange", summary="Figure: share of rows outside the training range, per hour",
            response_class=Response, responses=_FIGURE_RESPONSES, **auth.READ)
def plot_outside(request: Request, name: ModelName, version: int | None = VersionQuery, since: str | None = SinceQuery,
                 until: str | None = UntilQuery, format: str = FormatQuery) -> Response:
    return _figure(request, name, version, since, until, "outside", format)


@router.get("/models/{name}/plots/live-error", operation_id="plotLiveError", summary="Figure: real error of scored outcomes per hour against the CV band",
            response_class=Response, responses=_FIGURE_RESPONSES, **auth.READ)
def plot_live_error(request: Request, name: ModelName, version: int | None = VersionQuery,
                    since: str | None = SinceQuery, until: str | None = UntilQuery, format: str = FormatQuery) -> Response:
    return _figure(request, name, version, since, until, "error", format)
