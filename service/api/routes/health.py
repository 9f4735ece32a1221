"""Routes outside ``/v1``: liveness, readiness and the problem-type documentation (open), and metrics.

``/metrics`` needs a key with the ``metrics`` (or ``admin``) scope once any key exists, like a ``/v1``
route (its counters name models and versions); while no key exists it is open, as every route is, on
a server that then listens on loopback only.
"""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request
from fastapi.responses import HTMLResponse, Response
from prometheus_client import CONTENT_TYPE_LATEST

from service import problems
from service.api import answers as A, auth, exception_handlers
from service.errors import NotFound

router = APIRouter(tags=["health"])


@router.get("/healthz", summary="The process is up", operation_id="getHealth",
            responses=A.document(A.Health, "The process answers."))
async def healthz() -> Response:
    return A.reply(A.Health, {"status": "ok"})


@router.get(
    "/readyz", summary="The catalog answers, the store folder is writable and every version folder is listed",
    operation_id="getReadiness",
    responses={**A.document(A.Readiness, "Ready."), 503: {
        "description": "Not ready; the body (problem details with 'checks') says which check failed.",
        "content": {problems.PROBLEM_MEDIA_TYPE: {"schema": {"$ref": "#/components/schemas/Problem"}}}}},
)
def readyz(request: Request):
    store = request.app.state.store
    try:
        checks = dict(store.ping())  # {"catalog": "ok", "store": "ok"}; raises naming what failed
    except Exception as exc:  # report, do not raise: readiness is an answer, not an error
        checks = {"failure": " ".join(str(exc).split())[:300] or type(exc).__name__}
    ready = all(v == "ok" for v in checks.values())
    if ready:
        return A.reply(A.Readiness, {"status": "ready", "checks": checks})
    failing = {k: v for k, v in checks.items() if v != "ok"}
    advice = "" if set(failing) == {"versions"} else (
        ". Check the catalog URL (TIKHON_DATABASE_URL) and the store folder (TIKHON_STORE) permissions")
    body = problems.problem_body(
        slug="not-ready", title="Not ready", status=503,
        detail="The service cannot take work: " + "; ".join(failing.values()) + advice + ".",
        instance="/readyz", checks=checks,
    )
    return exception_handlers.problem_response(body, {"Retry-After": str(problems.CATALOG_RETRY_AFTER_S)})


@router.get("/metrics", summary="Prometheus text format (metrics or admin scope once keys exist)",
            response_class=Response, operation_id="getMetrics", responses={200: {
                "description": "Prometheus text exposition format.",
                "content": {"text/plain": {"schema": {"type": "string"}}}}}, dependencies=[Depends(auth.authorize)], **auth.METRICS)
def metrics(request: Request) -> Response:
    return Response(request.app.state.metrics.render(), media_type=CONTENT_TYPE_LATEST)


@router.get("/problems", summary="Every problem type the API answers with", operation_id="listProblemTypes",
            responses=A.document(A.ProblemTypes, "Problem types by slug."))
async def problem_types() -> Response:
    return A.reply(A.ProblemTypes, {slug: {"type": f"/problems/{slug}", **info}
                                    for slug, info in problems.catalogue().items()})


@router.get("/problems/{slug}", summary="What one problem type means", response_class=HTMLResponse,
            operation_id="getProblemType", responses={200: {"description": "An HTML page describing the type.",
                                                            "content": {"text/html": {"schema": {"type": "string"}}}}})
async def problem_type(slug: str) -> HTMLResponse:
    info = problems.catalogue().get(slug)
    if info is None:
        raise NotFound(f"there is no problem type {slug!r}; GET /problems lists them all.")
    from html import escape

    return HTMLResponse(
        f"<!doctype html><title>{escape(info['title'])}</title><h1>{escape(info['title'])}</h1>"
        f"<p>{escape(info['description'])}</p><p>Problem type <code>/problems/{escape(slug)}</code> of the Tikhon API "
        "(RFC 9457 problem details). The <code>detail</code> member of each answer names the field, the value "
        "received and the fix.</p>"
    )
