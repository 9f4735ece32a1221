"""The one exception tree of Tikhon.

Every layer raises these and nothing else for expected failures. The HTTP layer translates them to
RFC 9457 problem details in one place (``service.problems``); the CLI prints ``str(err)`` on one
line. Messages follow one rule: name what is wrong (the field or parameter), the value received, and
the fix.

Each class carries a stable ``slug`` (used in the problem ``type`` URI) and a short ``title``. Nothing
here knows HTTP status codes; the mapping lives with the API.
"""

from __future__ import annotations

from typing import Any


class TikhonError(Exception):
    """Base class. ``detail`` is one human sentence; ``errors`` optionally lists field-level problems."""

    slug = "error"
    title = "Request failed"

    def __init__(self, detail: str, *, errors: list[dict[str, Any]] | None = None, **extra: Any):
        super().__init__(detail)
        self.detail = detail
        self.errors = errors or []
        self.extra = extra

    def __str__(self) -> str:  # one line, always
        return " ".join(self.detail.split())

    def __reduce__(self):  # keep the fields when an error crosses a process (worker pool, Dask)
        return (_rebuild, (type(self), self.detail, self.errors, self.extra))


def _rebuild(cls: type, detail: str, errors: list[dict[str, Any]], extra: dict[str, Any]) -> "TikhonError":
    return cls(detail, errors=errors, **extra)


class InvalidSpec(TikhonError):
    """The training spec is malformed or inconsistent with the data."""

    slug = "invalid-spec"
    title = "Invalid training spec"


class CannotContinue(InvalidSpec):
    """A continued training (``continue_from``) that the parent version or the new rows cannot give: the
    version keeps no per-fold summaries, its scheme cannot take new rows, or the new rows' columns differ."""

    slug = "cannot-continue"
    title = "Version cannot be continued"


class InvalidData(TikhonError):
    """The data cannot be used: unknown or missing columns, NaN/inf, wrong types, ragged CSV..."""

    slug = "invalid-data"
    title = "Invalid data"


class SourceChanged(InvalidData):
    """A file of a training source changed, was deleted or was replaced by a link after the job was submitted."""

    slug = "source-changed"
    title = "Training data changed"


class InvalidRequest(InvalidData):
    """A field of the request itself (not the data, not the spec) has a value the service does not accept."""

    slug = "invalid-request"
    title = "Invalid request"


def choice_message(value: Any, expected: str) -> str:
    """Say that ``value`` is not one of the allowed values listed in ``expected`` (a pydantic-style list such
    as "'always', 'if_better' or 'never'"), and name the closest allowed value when one is close."""
    import difflib
    import re

    allowed = re.findall(r"'([^']*)'", expected) or [expected]
    text = f"{value!r} is not one of the allowed values {', '.join(repr(a) for a in allowed)}"
    if isinstance(value, str):
        close = difflib.get_close_matches(value.replace("-", "_").lower(), allowed, n=1, cutoff=0.5)
        if close:
            text += f" (did you mean {close[0]!r}?)"
    return text


class BudgetExceeded(TikhonError):
    """A configured limit (grid size, rows, body size, training time) would be exceeded."""

    slug = "limit-exceeded"
    title = "Limit exceeded"


class Busy(TikhonError):
    """A capacity limit is reached for now (queued training jobs, overall or per key); retry later.
    ``retry_after`` (seconds) travels in ``extra``."""

    slug = "busy"
    title = "At capacity for now"


class InvalidName(TikhonError):
    slug = "invalid-name"
    title = "Invalid model name"


class NotFound(TikhonError):
    slug = "not-found"
    title = "Not found"


class Conflict(TikhonError):
    """The request contradicts the current state (deleting a live version, cancelling a finished job)."""

    slug = "conflict"
    title = "Conflict"


class JobTaken(Conflict):
    """A worker no longer holds the training job it worked on (re-queued to another worker, or the job
    already published); its result is dropped and the job's current holder decides."""


class IntegrityFailure(TikhonError):
    """A stored artifact failed its checksum, format-version or no-pickle check."""

    slug = "integrity-failure"
    title = "Stored artifact failed verification"


class StorageFailure(TikhonError):
    """The store could not be written (disk full, permission), nothing was published."""

    slug = "storage-failure"
    title = "Storage failure"


class CatalogUnavailable(StorageFailure):
    """The catalog cannot be used right now: its database does not answer (stopped, restarting,
    unreachable), or its file was deleted, emptied or replaced while the service ran; nothing was changed.
    Temporary: retry after the ``Retry-After`` seconds. Predictions of versions a replica already serves
    keep answering meanwhile, on stale knowledge, for a bounded time (``TIKHON_STALE_OK_S``)."""

    slug = "catalog-unavailable"
    title = "Catalog unavailable"


class Cancelled(TikhonError):
    slug = "cancelled"
    title = "Cancelled"


class Unauthorized(TikhonError):
    slug = "unauthorized"
    title = "Missing or invalid API key"


class Forbidden(TikhonError):
    slug = "forbidden"
    title = "API key lacks the required scope"
