"""Problem details (RFC 9457) as plain dicts: the status of each error class and the problem body.

Every layer raises ``service.errors.TikhonError`` subclasses. This module picks the status per class
(``status_for``) and builds the problem object (``problem_from_error``, ``problem_body``) without any
HTTP library, so a training process can record a failed job's problem without importing the web
framework. ``service.api.exception_handlers`` is the one place that turns these bodies into HTTP
responses (FastAPI's request-validation errors, Starlette's HTTP errors and unexpected exceptions
included).

Problem ``type`` values are relative references ``/problems/<slug>``; the app serves a short
explanation of each type at that address (RFC 9457 section 3.1.1 recommends that a dereferenceable
type URI leads to human-readable documentation).
"""

from __future__ import annotations

import math
from typing import Any
from urllib.parse import quote

from service import errors as E
from service import paths

PROBLEM_MEDIA_TYPE = "application/problem+json"


class MalformedBody(E.InvalidData):
    """The body cannot be parsed at all (not JSON, not CSV, broken multipart). Raised by the HTTP layer only."""

    slug = "malformed-request"
    title = "Malformed request body"


class UnsupportedMediaType(E.InvalidData):
    """The Content-Type is not one the route reads. Raised by the HTTP layer only."""

    slug = "unsupported-media-type"
    title = "Unsupported media type"


# Status per class. Subclasses not listed inherit their nearest listed ancestor's status.
_STATUS: dict[type[E.TikhonError], int] = {
    MalformedBody: 400,
    UnsupportedMediaType: 415,
    E.InvalidSpec: 422,
    E.InvalidData: 422,
    E.BudgetExceeded: 422,
    E.InvalidName: 422,
    E.Busy: 429,
    E.NotFound: 404,
    E.Conflict: 409,
    E.Cancelled: 409,
    E.IntegrityFailure: 500,
    E.CatalogUnavailable: 503,
    E.StorageFailure: 507,
    E.Unauthorized: 401,
    E.Forbidden: 403,
    E.TikhonError: 400,
}

# Seconds a caller is told to wait (Retry-After, RFC 9110 section 10.2.3) when the catalog does not answer:
# a database restart takes seconds, and callers retrying sooner only add load to the one recovering.
CATALOG_RETRY_AFTER_S = 5

# Limits whose excess is "the request itself is too large" (413); any other limit, such as the grid
# budget of a training spec, is a semantic refusal (422).
SIZE_LIMITS = frozenset({"max_body_bytes", "max_rows_per_request", "max_training_rows"})

# Slugs of the problems the HTTP layer raises itself (not TikhonError classes).
_HTTP_PROBLEMS: dict[str, tuple[str, str]] = {
    "malformed-request": ("Malformed request body", "The body is not valid JSON, CSV or multipart, or is empty."),
    "invalid-request": ("Invalid request", "A field of the request has the wrong type, is missing, or is not allowed."),
    "route-not-found": ("No such route", "No route matches this path; see /openapi.json for the routes."),
    "method-not-allowed": ("Method not allowed", "The route exists but not with this HTTP method."),
    "unsupported-media-type": ("Unsupported media type", "The Content-Type is not one this route reads."),
    "not-acceptable": ("Not acceptable", "The Accept header asks for a format this route cannot produce."),
    "cors-origin-not-allowed": ("Origin not allowed", "A browser page on another site sent a CORS preflight, and "
                                "its origin is not in TIKHON_CORS_ORIGINS; the operator adds it there to allow it."),
    "internal-error": ("Internal error", "An unexpected failure on the server; report the request id."),
    "not-ready": ("Not ready", "The catalog does not answer or was replaced, the store folder is not writable, or "
                  "version folders are not in the catalog (run `tikhon store recover`)."),
    "worker-lost": ("Training worker lost", "A training job's worker stopped sending heartbeats on every attempt "
                    "(killed, out of memory, host lost); the job was failed after the configured attempts."),
}

# What each problem type means to the person reading it, and what to do (shown at /problems and
# /problems/<slug>); a type missing here falls back to its class docstring.
_FOR_PEOPLE: dict[str, str] = {
    "error": "The request failed for a reason no more specific type covers; the detail says what went wrong and "
             "what to change.",
    "invalid-spec": "The training spec cannot be used as sent: a field has a wrong value, or it names columns the "
                    "data does not have. The detail names the field, the value received and the allowed values.",
    "invalid-data": "The data cannot be used as sent: a column is missing or unknown, a value is not a number where "
                    "one is needed, a value is empty, NaN or infinite, or the CSV is not comma-separated. The detail "
                    "names the column, the first rows concerned and the fix.",
    "cannot-continue": "A training request with continue_from names a version that cannot take new rows: it keeps no "
                       "per-fold summaries (trained before continued training, or above max_summary_bytes), its "
                       "cross-validation cannot place new rows in folds (loo, time_ordered, repeated_kfold, basis_fit "
                       "per_fold, shuffle assignment, or the mae metric), or the new rows have other columns. The "
                       "detail says which; train from scratch on all rows with cv.assignment 'hash', then continue.",
    "source-changed": "A file of the job's data source changed size, modification time or content, was deleted, "
                      "or was replaced by a symbolic link after the job was accepted. The job stopped and published "
                      "nothing; keep a source's files unchanged while its job runs (write new data to a new folder) "
                      "and submit again.",
    "invalid-request": "A field of the request itself (not the data, not the spec) has a wrong type, is missing, or "
                       "is not one of the allowed values. The detail names the field and the values it accepts.",
    "limit-exceeded": "The request would go past a limit set on the server (rows per request, body size, grid "
                      "size, training time). The detail names the setting and its value: make the request smaller, "
                      "or ask the operator to raise that setting.",
    "busy": "The server's training queue is full, or the key has as many jobs queued as it may. Nothing was "
            "queued; retry after the seconds in Retry-After, or wait for queued jobs to finish.",
    "foreign-store-folder": "The store folder (TIKHON_STORE) holds files that Tikhon did not write and no store "
                            "marker, so the service refused to start there and touched nothing. Point TIKHON_STORE "
                            "at an empty folder or at an existing Tikhon store.",
    "invalid-name": "The model name is not allowed. Names are 1-63 characters of lower-case letters, digits, "
                    "'_', '.' and '-', starting with a letter or digit.",
    "not-found": "The model, version, job or key does not exist, or was deleted. For a mistyped model name the "
                 "detail lists the closest names on the server.",
    "conflict": "The request contradicts the current state, for example deleting the live version or cancelling "
                "a job that has already ended. Nothing was changed; the detail says what the state is.",
    "integrity-failure": "A stored version's files failed verification (checksum, format version, or content). "
                         "The version is not served; the operator should restore it from a backup or retrain.",
    "storage-failure": "The store could not be written (disk full, permissions). Nothing was published; free "
                       "space or fix permissions in the store folder and retry.",
    "catalog-unavailable": "The catalog (the database that lists models and versions) does not answer, or was "
                           "replaced while the service ran. Nothing was written; retry after the time in "
                           "Retry-After, and tell the operator if it persists.",
    "cancelled": "The training job was cancelled before it finished; no version was published by it.",
    "unauthorized": "No API key was sent, or the key is unknown or revoked. Send a key with the scope the route "
                    "needs (the command-line client takes --key or TIKHON_KEY).",
    "forbidden": "The API key is valid but lacks the scope this route needs (predict, train, admin or metrics). "
                 "Use a key with that scope.",
}

# Status of the problems the store records on jobs by itself (it knows no HTTP): the job failed on the server.
_STORED_STATUS = {"worker-lost": 500}


def stored_problem(problem: dict[str, Any] | None) -> dict[str, Any] | None:
    """A problem object recorded on a job, in the RFC 9457 shape every answer uses: the store writes some
    with a bare slug as ``type`` (``"worker-lost"``) and no ``status``; they get the ``/problems/<slug>``
    type (documented at that address) and their status here, at the one HTTP boundary."""
    if not isinstance(problem, dict):
        return problem
    problem = paths.redact_all(problem)  # recorded by a worker, maybe before the paths were made relative
    kind = problem.get("type")
    if isinstance(kind, str) and kind and "/" not in kind:
        problem = {**problem, "type": f"/problems/{kind}"}
        if "status" not in problem and kind in _STORED_STATUS:
            problem["status"] = _STORED_STATUS[kind]
    return problem


def status_for(err: E.TikhonError) -> int:
    if isinstance(err, E.BudgetExceeded):
        return 413 if err.extra.get("limit") in SIZE_LIMITS else 422
    for cls in type(err).__mro__:
        if cls in _STATUS:
            return _STATUS[cls]
    return 400


def catalogue() -> dict[str, dict[str, str]]:
    """Every problem type this service can answer with: slug -> title and a one-line description."""
    out: dict[str, dict[str, str]] = {}
    classes = [E.TikhonError, *_all_subclasses(E.TikhonError)]
    for cls in classes:
        doc = _FOR_PEOPLE.get(cls.slug) or " ".join((cls.__doc__ or cls.title).split())
        out.setdefault(cls.slug, {"title": cls.title, "description": doc})
    for slug, (title, desc) in _HTTP_PROBLEMS.items():
        out[slug] = {"title": title, "description": _FOR_PEOPLE.get(slug, desc)}
    return out


def _all_subclasses(cls: type) -> list[type]:
    found = []
    for sub in cls.__subclasses__():
        found.append(sub)
        found.extend(_all_subclasses(sub))
    return found


def _jsonable(value: Any) -> Any:
    """Make an echoed input value safe for JSON (NaN/inf become strings, unknown objects their repr)."""
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if value is None or isinstance(value, (str, int, float, bool)):
        return value
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value[:20]]
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in list(value.items())[:20]}
    text = repr(value)
    return text if len(text) <= 200 else text[:200] + "..."


# RFC 3986 section 3.3: the characters a path may carry unencoded (pchar without pct-encoded, plus "/").
_PATH_SAFE = "/-._~!$&'()*+,;=:@"


def as_uri_reference(path: str) -> str:
    """``instance`` must be a URI reference (RFC 9457 section 3.1.5); the request path arrives decoded, so
    anything outside RFC 3986's path characters (spaces, non-ASCII, control characters, a literal '%') is
    percent-encoded again as UTF-8."""
    return quote(path, safe=_PATH_SAFE, errors="surrogatepass")


def problem_body(
    *, slug: str, title: str, status: int, detail: str, instance: str | None = None,
    request_id: str | None = None, errors: list[dict[str, Any]] | None = None, **extra: Any
) -> dict[str, Any]:
    # No absolute path of the data folder or the store leaves the server (service.paths.redact).
    body: dict[str, Any] = {"type": f"/problems/{slug}", "title": title, "status": status,
                            "detail": paths.redact(detail)}
    if instance:
        body["instance"] = as_uri_reference(instance)
    if request_id:
        body["request_id"] = request_id
    if errors:
        body["errors"] = [paths.redact_all(_jsonable(e)) for e in errors]
    for key, value in extra.items():
        if key not in body:
            body[key] = paths.redact_all(_jsonable(value))
    return body


def problem_from_error(err: E.TikhonError, *, instance: str | None = None, request_id: str | None = None) -> dict[str, Any]:
    """The problem object of a TikhonError (also used for failed jobs, with no instance)."""
    status = status_for(err)
    extra = {k: v for k, v in err.extra.items() if k in ("limit", "allowed", "received", "field", "value")}
    return problem_body(
        slug=err.slug, title=err.title, status=status, detail=str(err), instance=instance,
        request_id=request_id, errors=err.errors, **extra,
    )


def internal_error_body(path: str | None, request_id: str | None) -> dict[str, Any]:
    return problem_body(
        slug="internal-error", title="Internal error", status=500,
        detail="The server failed unexpectedly while handling this request; nothing was changed by it unless "
        "its response says so. Retry, and if it persists report the request id to the operator.",
        instance=path, request_id=request_id,
    )
