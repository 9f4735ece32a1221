"""API keys: created with scopes, shown once, stored as SHA-256 hashes, verified in constant time.

A key reads ``tikhon_<key id>_<secret>``: the key id (12 hex characters) is public and names the key
in listings and logs; the secret is 32 random bytes (URL-safe base64). The catalog keeps the SHA-256 of
the whole key. A plain hash (no slow key-derivation function) is enough because the secret has 256
bits of entropy, so there is nothing to guess by brute force (common practice for random API tokens).
Verification looks the row up by key id and compares hashes with ``hmac.compare_digest``.

Verified keys are cached for the store's ``catalog_ttl_s`` (1 s by default), so a revocation made
elsewhere takes effect within that time, and at once in the process that revoked.
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
import threading
import time
from typing import Any, Iterable

from sqlalchemy import insert, select, update

from service.errors import Conflict, InvalidSpec, NotFound
from service.store.catalog import CatalogAccess
from service.store.schema import api_keys as keys_t
from service.store.util import iso, utcnow

SCOPES = ("predict", "train", "admin", "metrics")
KEY_PREFIX = "tikhon_"
_KEY_RE = re.compile(r"^tikhon_([0-9a-f]{12})_([A-Za-z0-9_-]{43})$")
_DUMMY_HASH = hashlib.sha256(b"no such key").hexdigest()


def _hash(secret: str) -> str:
    return hashlib.sha256(secret.encode("utf-8")).hexdigest()


class Keys:
    def __init__(self, db: CatalogAccess):
        self._db = db
        self._lock = threading.Lock()
        self._verified: dict[str, tuple[dict | None, float]] = {}
        self._any: tuple[bool, float] | None = None

    def create(self, scopes: Iterable[str], label: str) -> tuple[str, str]:
        """Create a key; return ``(key_id, secret)``. The secret is not stored and cannot be shown again."""
        if isinstance(scopes, str):
            scopes = [scopes]
        scopes = sorted(set(scopes or []))
        bad = [s for s in scopes if s not in SCOPES]
        if not scopes or bad:
            raise InvalidSpec(
                f"scopes {bad or scopes!r} are not valid; give one or more of {', '.join(SCOPES)}.",
                errors=[{"field": "scopes", "value": bad or scopes, "message": f"each one of {', '.join(SCOPES)}"}],
            )
        if not isinstance(label, str) or len(label) > 200:
            raise InvalidSpec(f"label must be a string of at most 200 characters, received {label!r}.",
                              errors=[{"field": "label", "value": repr(label), "message": "at most 200 characters"}])
        key_id = secrets.token_hex(6)
        secret = f"{KEY_PREFIX}{key_id}_{secrets.token_urlsafe(32)}"
        with self._db.errors("creating an API key"), self._db.write() as conn:
            conn.execute(insert(keys_t).values(key_id=key_id, secret_sha256=_hash(secret), scopes=scopes,
                                               label=label, created_at=utcnow(), revoked_at=None))
        with self._lock:
            self._any = None
        return key_id, secret

    def verify(self, secret: str) -> dict[str, Any] | None:
        """The key's id, scopes and label when ``secret`` is an active key, else None."""
        if not isinstance(secret, str):
            return None
        digest = _hash(secret)
        with self._lock:
            hit = self._verified.get(digest)
        if hit is not None and self._db.fresh(hit[1]):
            return hit[0]
        m = _KEY_RE.fullmatch(secret)
        row = None
        if m is not None:
            with self._db.errors("verifying an API key"), self._db.read() as conn:
                row = conn.execute(select(keys_t).where(keys_t.c.key_id == m.group(1))).first()
        stored = row.secret_sha256 if row is not None else _DUMMY_HASH
        ok = hmac.compare_digest(digest, stored) and row is not None and row.revoked_at is None
        out = ({"key_id": row.key_id, "scopes": list(row.scopes), "label": row.label,
                "created_at": iso(row.created_at)} if ok else None)
        with self._lock:
            if len(self._verified) > 10_000:
                self._verified.clear()
            self._verified[digest] = (out, time.monotonic())
        return out

    def list(self) -> list[dict[str, Any]]:
        with self._db.errors("listing API keys"), self._db.read() as conn:
            rows = conn.execute(select(keys_t).order_by(keys_t.c.created_at, keys_t.c.key_id)).all()
        return [
            {"key_id": r.key_id, "scopes": list(r.scopes), "label": r.label, "created_at": iso(r.created_at),
             "revoked_at": iso(r.revoked_at), "active": r.revoked_at is None}
            for r in rows
        ]

    def revoke(self, key_id: str, *, keep_last_admin: bool = False) -> dict[str, Any]:
        """Revoke a key (idempotent); return its listing entry.

        ``keep_last_admin`` (the HTTP route sets it): refuse with ``Conflict`` to revoke the last active key
        holding the admin scope, so no one can lock every operator out over the network. The active keys are
        read with ``FOR UPDATE`` on PostgreSQL (SQLite's write transaction is already exclusive), so two
        concurrent revocations of the last two admin keys cannot both pass the check."""
        with self._db.errors("revoking an API key"), self._db.write() as conn:
            row = conn.execute(select(keys_t).where(keys_t.c.key_id == str(key_id))).first()
            if row is None:
                raise NotFound(f"API key {key_id!r} does not exist; `tikhon keys list` shows the key ids.")
            if keep_last_admin and row.revoked_at is None and "admin" in (row.scopes or ()):
                active = conn.execute(select(keys_t.c.key_id, keys_t.c.scopes)
                                      .where(keys_t.c.revoked_at.is_(None)).with_for_update()).all()
                others = [r.key_id for r in active if r.key_id != row.key_id and "admin" in (r.scopes or ())]
                if not others:
                    raise Conflict(
                        f"API key {row.key_id!r} is the last active admin key; revoking it over HTTP would leave no "
                        "one able to manage this server. Create another admin key first (POST /v1/keys), or revoke "
                        f"it on the server's machine with 'tikhon keys revoke --local {row.key_id}'."
                    )
            if row.revoked_at is None:
                conn.execute(update(keys_t).where(keys_t.c.key_id == row.key_id).values(revoked_at=utcnow()))
        with self._lock:
            self._verified.clear()
            self._any = None
        return next(k for k in self.list() if k["key_id"] == row.key_id)

    def any_active(self) -> bool:
        with self._lock:
            hit = self._any
        if hit is not None and self._db.fresh(hit[1]):
            return hit[0]
        with self._db.errors("reading API keys"), self._db.read() as conn:
            found = conn.execute(select(keys_t.c.key_id).where(keys_t.c.revoked_at.is_(None)).limit(1)).first()
        with self._lock:
            self._any = (found is not None, time.monotonic())
        return found is not None
