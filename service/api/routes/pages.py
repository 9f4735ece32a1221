"""The HTML overview (``/``, ``/models/{name}``), its sign-in form and its two static files.

Read-only. When API keys exist, a page needs a key holding a read scope (``predict``, ``train`` or
``admin``, the same as the ``/v1`` routes it shows), either in the Authorization header or in the
HttpOnly, SameSite=Strict cookie that ``POST /login`` sets after checking the key. Without a key the
browser is sent to the sign-in form. The cookie authorizes GET/HEAD only (``service.api.auth``).
"""

from __future__ import annotations

from pathlib import Path as FilePath
from urllib.parse import quote, urlsplit

from fastapi import APIRouter, Path, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from service import paths
from service.api import auth
from service.api.rendering import pages
from service.api.views import job_view
from service.errors import Forbidden, NotFound, TikhonError, Unauthorized
from service.store.names import validate_name

router = APIRouter(include_in_schema=False)

WEB = FilePath(__file__).resolve().parent.parent / "rendering" / "web"
ASSETS = {"tikhon.css": "text/css; charset=utf-8", "tikhon.js": "text/javascript; charset=utf-8"}
# The scopes of the /v1 read routes the pages show (predict, train, admin).
READ_SCOPES = frozenset(s for req in auth.READ["openapi_extra"]["security"] for s in req[auth.SCHEME])

_HEADERS = {
    "Content-Security-Policy": "default-src 'self'; img-src 'self'; style-src 'self'; script-src 'self'; "
    "connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'; object-src 'none'",
    "X-Content-Type-Options": "nosniff",
    # same-origin, not no-referrer: under no-referrer a browser sends "Origin: null" with a form POST (Fetch
    # standard, "append a request Origin header"), and /login must see its own origin to refuse other sites.
    # Other sites still get no referrer at all.
    "Referrer-Policy": "same-origin",
    "Cache-Control": "no-store",
    "X-Frame-Options": "DENY",
}


def _html(text: str, status: int = 200) -> HTMLResponse:
    return HTMLResponse(text, status_code=status, headers=_HEADERS)


class _SignIn(Exception):
    """The page needs a key: answer with a redirect to the sign-in form."""


def _access(request: Request) -> bool:
    """Check the caller may read; return whether a key (header or cookie) was used."""
    gate: auth.KeyGate = request.app.state.gate
    header = auth.credentials(request)
    try:
        key_id = gate.check(header, READ_SCOPES)
    except Unauthorized:
        raise _SignIn() from None
    return key_id is not None and request.cookies.get(auth.COOKIE) is not None


def _guarded(request: Request, render) -> Response:
    try:
        signed_in = _access(request)
    except _SignIn:
        target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        return RedirectResponse(f"/login?next={quote(target, safe='')}", status_code=303, headers=_HEADERS)
    except Forbidden as exc:
        return _html(pages.error_page("This key cannot read the overview", str(exc), signed_in=True), 403)
    try:
        return _html(render(signed_in))
    except TikhonError as exc:  # the same message and status as the JSON problem, as a page
        from service.problems import status_for

        return _html(pages.error_page(exc.title, paths.redact(str(exc)), signed_in=signed_in), status_for(exc))


@router.get("/", response_class=HTMLResponse)
def overview(request: Request) -> Response:
    store = request.app.state.store

    def render(signed_in: bool) -> str:
        models = store.list_models()
        live_rows = {}
        for m in models:
            if m.get("live_version"):
                try:
                    live_rows[m["name"]] = store.get_version(m["name"], m["live_version"])
                except NotFound:  # deleted between the two reads; show the model without it
                    live_rows[m["name"]] = None
        jobs = _jobs(store, None)
        return pages.overview(models, live_rows, jobs, signed_in=signed_in, deleted=_deleted_versions(store, jobs))

    return _guarded(request, render)


def _deleted_versions(store, jobs: list[dict], shown: int = 15) -> set[tuple[str, int]]:
    """(model, version) of the shown jobs whose version has been deleted since (pruned or deleted)."""
    out: set[tuple[str, int]] = set()
    done = [j for j in jobs[:shown] if j.get("state") == "succeeded" and j.get("version") is not None]
    for name in {str(j.get("model")) for j in done}:
        try:
            alive = {v["version"] for v in store.list_versions(name)}
        except NotFound:
            alive = set()
        out |= {(name, j["version"]) for j in done if str(j.get("model")) == name and j["version"] not in alive}
    return out


def _jobs(store, name: str | None) -> list[dict]:
    return [job_view(j) for j in store.jobs.list(name=name)]


@router.get("/models/{name}", response_class=HTMLResponse)
def model(request: Request, name: str = Path(...), version: str | None = Query(None)) -> Response:
    store = request.app.state.store

    def render(signed_in: bool) -> str:
        validate_name(name)
        info = store.get_model(name)
        versions = store.list_versions(name)
        history = store.history(name)
        jobs = _jobs(store, name)
        numbers = [v["version"] for v in versions]
        if version is not None:
            try:
                selected = int(version)
            except ValueError:
                raise NotFound(f"version {version!r} of model {name!r} does not exist; versions are whole numbers "
                               f"(this model has {', '.join(map(str, numbers)) or 'none'}).") from None
            if selected not in numbers:
                raise NotFound(f"model {name!r} has no version {selected}; it has "
                               f"{', '.join(map(str, numbers)) or 'none'}.")
        else:
            selected = info.get("live_version") or (numbers[-1] if numbers else None)
        manifest = store.get_manifest(name, selected, cv_table=False) if selected is not None else None
        return pages.model_page(name, info, versions, history, jobs, selected, manifest, signed_in=signed_in)

    return _guarded(request, render)


def _safe_next(value: str | None) -> str:
    """Only a path on this site (no scheme, no host, no '//' or backslash tricks) may follow a sign-in."""
    if not value or not value.startswith("/") or value.startswith("//") or "\\" in value:
        return "/"
    parts = urlsplit(value)
    if parts.scheme or parts.netloc:
        return "/"
    return value


def _foreign_origin(request: Request) -> str | None:
    """Why a sign-in post is refused (login CSRF), or None when it comes from this server's own page.

    A browser sends ``Origin`` with every form POST (Fetch standard, "append a request Origin header");
    a missing one, ``null`` (sandboxed frames, ``data:`` pages, some redirects) or another site's is
    refused, so no other page can sign a visitor in under a key of its choosing. The Origin's host and
    port must equal the ``Host`` the request was sent to."""
    origin = (request.headers.get("origin") or "").strip()
    if not origin:
        return ("The sign-in form arrived without an Origin header, so it cannot be told apart from a post "
                "made by another site; sign in from this server's own sign-in page in a web browser.")
    if origin.lower() == "null":
        return ("The sign-in form was posted from an opaque origin (Origin: null: a sandboxed frame, a local file "
                "or a data: page); open this server's sign-in page and post it from there.")
    parts = urlsplit(origin)
    host = (request.headers.get("host") or "").strip().lower()
    if parts.scheme not in ("http", "https") or not parts.netloc or parts.netloc.lower() != host:
        return (f"The sign-in form was posted from another site ({origin[:200]}); open the sign-in page of this "
                "server and post it from there.")
    return None


@router.get("/login", response_class=HTMLResponse)
def login_form(request: Request, next: str | None = Query(None)) -> Response:
    return _html(pages.login_page(_safe_next(next)))


@router.post("/login", response_class=HTMLResponse)
async def login(request: Request) -> Response:
    from anyio import to_thread

    refusal = _foreign_origin(request)
    if refusal is not None:
        return _html(pages.error_page("Sign-in refused", refusal, signed_in=False), 403)
    try:
        form = await request.form(max_files=0, max_fields=4)
    except Exception:
        form = {}
    key = str(form.get("key") or "").strip()
    next_url = _safe_next(str(form.get("next") or "/"))
    gate: auth.KeyGate = request.app.state.gate
    if not key:
        return _html(pages.login_page(next_url, message="Paste an API key into the field."), 400)
    try:
        await to_thread.run_sync(gate.check, f"Bearer {key}", READ_SCOPES)
    except Unauthorized:
        return _html(pages.login_page(next_url, message=(
            "This key is unknown or revoked on this server. Paste an active key; an operator lists them with "
            "'tikhon keys list' and makes one with 'tikhon keys create --scope predict'.")), 401)
    except Forbidden as exc:
        return _html(pages.login_page(next_url, message=str(exc)), 403)
    response = RedirectResponse(next_url, status_code=303, headers=_HEADERS)
    response.set_cookie(auth.COOKIE, key, httponly=True, samesite="strict", path="/",
                        secure=request.url.scheme == "https")
    return response


@router.post("/logout")
def logout(request: Request) -> Response:
    response = RedirectResponse("/login", status_code=303, headers=_HEADERS)
    response.delete_cookie(auth.COOKIE, path="/", httponly=True, samesite="strict")
    return response


@router.get("/assets/{file}")
def asset(file: str) -> Response:
    if file not in ASSETS:
        raise NotFound(f"there is no asset {file!r}; the page uses {', '.join(sorted(ASSETS))}.")
    return Response((WEB / file).read_bytes(), media_type=ASSETS[file],
                    headers={"Cache-Control": "public, max-age=300", "X-Content-Type-Options": "nosniff"})
