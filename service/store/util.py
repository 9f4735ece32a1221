"""Small shared helpers of the store: time, row conversion, error wrapping."""

from __future__ import annotations

from contextlib import contextmanager
from datetime import datetime, timezone
from typing import Any, Iterator

from sqlalchemy import exc as sa_exc
from sqlalchemy.exc import SQLAlchemyError

from service import paths
from service.errors import CatalogUnavailable, StorageFailure, TikhonError


def utcnow() -> datetime:
    return datetime.now(timezone.utc)


def as_utc(value: datetime | None) -> datetime | None:
    """SQLite hands back naive datetimes (stored as UTC); PostgreSQL aware ones in the session zone."""
    if value is None:
        return None
    if value.tzinfo is None:
        return value.replace(tzinfo=timezone.utc)
    return value.astimezone(timezone.utc)


def iso(value: datetime | None) -> str | None:
    value = as_utc(value)
    return None if value is None else value.isoformat()


@contextmanager
def catalog_errors(what: str, url: str) -> Iterator[None]:
    """Turn database driver errors into ``StorageFailure`` naming the operation and the catalog:
    ``CatalogUnavailable`` (temporary, HTTP 503) when the database cannot be reached, plain
    ``StorageFailure`` (HTTP 507) when it answered but could not store (disk full, read-only)."""
    try:
        yield
    except TikhonError:
        raise
    except SQLAlchemyError as exc:
        msg = paths.redact(" ".join(str(getattr(exc, "orig", None) or exc).split())[:300])
        if is_unreachable(exc):
            raise CatalogUnavailable(
                f"{what} failed: the catalog at {shown_url(url)} does not answer ({msg}); nothing was changed, "
                "retry later."
            ) from exc
        raise StorageFailure(f"{what} failed in the catalog at {shown_url(url)}: {msg}") from exc


def shown_url(url: str) -> str:
    """A catalog URL as messages show it: a SQLite file by its name only (its folder is the store or another
    local folder, never shown), any other URL as given (the password is already hidden by the caller)."""
    if url.startswith("sqlite") and ":///" in url:
        name = url.split(":///", 1)[1].rstrip("/").rsplit("/", 1)[-1] or "memory"
        return f"SQLite file {name!r}"
    return url


# SQLite reports a full or read-only disk as an OperationalError too; those are storage failures (507),
# not an outage: retrying does not help until an operator frees space.
_STORAGE_MESSAGES = ("database or disk is full", "disk i/o error", "readonly database", "read-only")


# SQLite's words for a catalog file that is no longer a database (emptied or overwritten while in use).
_LOST_FILE_MESSAGES = ("database disk image is malformed", "file is not a database")


def is_unreachable(exc: BaseException) -> bool:
    """Whether a database error means "the catalog cannot be reached now" (connection refused or lost,
    server shutting down, pool exhausted, database locked) rather than "it refused to store"."""
    if isinstance(exc, sa_exc.DBAPIError) and exc.connection_invalidated:
        return True
    if isinstance(exc, (sa_exc.DisconnectionError, sa_exc.TimeoutError)):
        return True
    if isinstance(exc, (sa_exc.OperationalError, sa_exc.InterfaceError)):
        text = str(getattr(exc, "orig", None) or exc).lower()
        return not any(m in text for m in _STORAGE_MESSAGES)
    if isinstance(exc, sa_exc.DatabaseError):  # SQLite: the catalog file was emptied or overwritten under us
        text = str(getattr(exc, "orig", None) or exc).lower()
        return any(m in text for m in _LOST_FILE_MESSAGES)
    return False


def row_dict(row: Any) -> dict[str, Any]:
    return dict(row._mapping)
