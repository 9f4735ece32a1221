"""Small shared helpers of the store: time, row conversion, error wrapping."""

from __future__ import annotations

from contextlib import contextmanager
from datetime import datetime, timezone
from typing import Any, Iterator

from sqlalchemy.exc import (
    DatabaseError,
    DataError,
    IntegrityError,
    InterfaceError,
    OperationalError,
    ProgrammingError,
    SQLAlchemyError,
)

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
    """Turn database driver errors into ``StorageFailure`` naming the operation and the catalog."""
    try:
        yield
    except TikhonError:
        raise
    except SQLAlchemyError as exc:
        msg = paths.redact(" ".join(str(getattr(exc, "orig", None) or exc).split())[:300])
        if _unavailable(exc):
            raise CatalogUnavailable(f"{what} failed: the catalog at {shown_url(url)} is unavailable ({msg}); "
                                     "nothing was written, retry when it is back.") from exc
        raise StorageFailure(f"{what} failed in the catalog at {shown_url(url)}: {msg}") from exc


def shown_url(url: str) -> str:
    """A catalog URL as messages show it: a SQLite file by its name only (its folder is the store or another
    local folder, never shown), any other URL as given (the password is already hidden by the caller)."""
    if url.startswith("sqlite") and ":///" in url:
        name = url.split(":///", 1)[1].rstrip("/").rsplit("/", 1)[-1] or "memory"
        return f"SQLite file {name!r}"
    return url


def _unavailable(exc: SQLAlchemyError) -> bool:
    """A catalog that cannot be reached or read (connection refused, file gone, malformed or not a
    database), as opposed to a statement the catalog refused (integrity, programming, data errors)."""
    if isinstance(exc, (IntegrityError, ProgrammingError, DataError)):
        return False
    return isinstance(exc, (OperationalError, InterfaceError, DatabaseError))


def row_dict(row: Any) -> dict[str, Any]:
    return dict(row._mapping)
