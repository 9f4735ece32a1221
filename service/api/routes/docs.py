"""The interactive API documentation at ``/docs``, served entirely from this server.

FastAPI's default page loads its script, style sheet and favicon from a public CDN, so it is blank on a
machine without internet access. Here the page is the same Swagger UI, but its three files come from
the ``swagger-ui-py`` package (which bundles the Swagger UI distribution with its Apache-2.0 licence)
under ``/docs/assets/``; the licence is served next to them. No request goes to another host.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

from fastapi import APIRouter, Request
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.responses import Response

from service.errors import NotFound

router = APIRouter(include_in_schema=False)

# The files the page needs, and their media types; nothing else of the package is served.
ASSETS = {
    "swagger-ui-bundle.js": "text/javascript; charset=utf-8",
    "swagger-ui.css": "text/css; charset=utf-8",
    "favicon-32x32.png": "image/png",
    "LICENSE": "text/plain; charset=utf-8",
}


def assets_dir() -> Path:
    """The ``static`` folder of the installed ``swagger-ui-py`` package (found without importing it)."""
    spec = importlib.util.find_spec("swagger_ui")
    if spec is None or not spec.submodule_search_locations:
        raise NotFound("the interactive documentation's files are not installed (package swagger-ui-py); "
                       "install the service with its dependencies (pip install -e .). /openapi.json works without them.")
    return Path(list(spec.submodule_search_locations)[0]) / "static"


@router.get("/docs")
def docs(request: Request) -> Response:
    page = get_swagger_ui_html(
        openapi_url="/openapi.json", title="Tikhon API",
        swagger_js_url="/docs/assets/swagger-ui-bundle.js", swagger_css_url="/docs/assets/swagger-ui.css",
        swagger_favicon_url="/docs/assets/favicon-32x32.png",
    )
    return Response(page.body, media_type="text/html; charset=utf-8", headers={"Cache-Control": "no-cache"})


@router.get("/docs/assets/{filename}")
def docs_asset(filename: str) -> Response:
    if filename not in ASSETS:
        raise NotFound(f"/docs/assets/{filename} is not a file of the documentation page; it uses "
                       f"{', '.join(sorted(ASSETS))}.")
    data = (assets_dir() / filename).read_bytes()
    return Response(data, media_type=ASSETS[filename], headers={"Cache-Control": "public, max-age=86400"})
