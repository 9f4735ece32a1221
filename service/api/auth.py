"""API keys: ``Authorization: Bearer <key>`` with scopes ``predict``, ``train`` and ``admin``.

Each ``/v1`` route declares which scopes may call it in its OpenAPI ``security`` requirement (one
requirement object per accepted scope, so any one of them suffices, as OpenAPI 3.1 defines). The
router-level dependency ``authorize`` reads that same declaration from the matched route, so the
document and the enforcement cannot drift apart. A route that declares nothing requires ``admin``
(fail closed).

When no active key exists at all, the routes are open: ``service.api.server.run`` then refuses to
bind anything but a loopback address. Key checks and the "does any key exist" answer are cached per
process for ``settings.auth_cache_s`` seconds.
"""

from __future__ import annotations

import threading
import time
from typing import Any, Iterable

from anyio import to_thread
from fastapi import Request

from service.api.coalesce import Coalescer
from service.errors import Forbidden, Unauthorized

SCHEME = "bearerKey"
SCOPES = ("predict", "train", "admin")

SECURITY_SCHEME = {
    "type": "http",
    "scheme": "bearer",
    "description": "An API key made with `tikhon keys create --scope predict|train|admin`. When no key exists the "
    "server only listens on loopback and needs none.",
}


def scopes(*accepted: str) -> dict[str, Any]:
    """Route keyword arguments declaring the scopes that may call it (any one suffices)."""
    for s in accepted:
        if s not in SCOPES:
            raise ValueError(f"unknown scope {s!r}")
    return {"openapi_extra": {"security": [{SCHEME: [s]} for s in accepted]}}


# The four kinds of route, in one place so every router uses the same policy.
READ = scopes("predict", "train", "admin")  # metadata a dashboard or a caller may read
PREDICT = scopes("predict", "admin")
TRAIN = scopes("train", "admin")
ADMIN = scopes("admin")


def accepted_scopes(route: Any) -> frozenset[str]:
    extra = getattr(route, "openapi_extra", None) or {}
    found = set()
    for requirement in extra.get("security", ()):
        for s in requirement.get(SCHEME, ()):
            found.add(s)
    return frozenset(found) or frozenset({"admin"})


def _scope_set(raw: Any) -> frozenset[str]:
    if raw is None:
        return frozenset()
    if isinstance(raw, str):
        return frozenset(s.strip() for s in raw.replace(",", " ").split() if s.strip())
    return frozenset(str(s) for s in raw)


class KeyGate:
    """Answers "may this Authorization header call a route accepting these scopes?" using the store's keys."""

    def __init__(self, keys, ttl_s: float):
        self._keys = keys
        self._ttl = ttl_s
        self._lock = threading.Lock()
        self._any: tuple[float, bool] | None = None
        self._verified: dict[str, tuple[float, tuple[frozenset[str], str] | None]] = {}
        self.lookups = Coalescer()  # concurrent checks of the same header share one catalog look-up

    def forget(self) -> None:
        with self._lock:
            self._any = None
            self._verified.clear()

    def _any_active(self) -> bool:
        now = time.monotonic()
        cached = self._any
        if cached is not None and now - cached[0] < self._ttl:
            return cached[1]
        value = bool(self._keys.any_active())
        self._any = (now, value)
        return value

    def _scopes_of(self, secret: str) -> tuple[frozenset[str], str] | None:
        now = time.monotonic()
        cached = self._verified.get(secret)
        if cached is not None and now - cached[0] < self._ttl:
            return cached[1]
        row = self._keys.verify(secret)
        value = None if row is None else (_scope_set(row.get("scopes")), str(row.get("key_id", "")))
        with self._lock:
            if len(self._verified) > 10_000:
                self._verified.clear()
            self._verified[secret] = (now, value)
        return value

    def needs_lookup(self, header: str | None) -> bool:
        now = time.monotonic()
        if self._any is None or now - self._any[0] >= self._ttl:
            return True
        if not self._any[1]:
            return False
        secret = _bearer(header)
        if secret is None:
            return False
        cached = self._verified.get(secret)
        return cached is None or now - cached[0] >= self._ttl

    def check(self, header: str | None, accepted: Iterable[str]) -> str | None:
        """Raise Unauthorized/Forbidden, or return the key id (None when no key is needed)."""
        accepted = frozenset(accepted)
        if not self._any_active():
            return None
        secret = _bearer(header)
        if secret is None:
            raise Unauthorized(
                "This route needs an API key: send 'Authorization: Bearer <key>' with a key holding one of the "
                f"scopes {sorted(accepted)}; an operator makes one with 'tikhon keys create --scope ...'."
            )
        found = self._scopes_of(secret)
        if found is None:
            raise Unauthorized(
                "The API key in the Authorization header is unknown or revoked; use an active key "
                "('tikhon keys list' shows them, 'tikhon keys create' makes a new one)."
            )
        held, key_id = found
        if not (held & accepted):
            raise Forbidden(
                f"The API key holds the scope(s) {sorted(held)} but this route needs one of {sorted(accepted)}; "
                "use a key with one of those scopes.",
                allowed=sorted(accepted),
            )
        return key_id


def _bearer(header: str | None) -> str | None:
    if not header:
        return None
    kind, _, value = header.partition(" ")
    if kind.lower() != "bearer" or not value.strip():
        return None
    return value.strip()


# The overview page's login form stores the key in this HttpOnly, SameSite=Strict cookie. It stands in
# for the Authorization header on reads only (GET/HEAD), so a page can embed figures and poll jobs while
# nothing that changes state is ever authorized by a cookie.
COOKIE = "tikhon_key"


def credentials(request: Request) -> str | None:
    """The Authorization header, or for GET/HEAD without one, the login cookie as a bearer header."""
    header = request.headers.get("authorization")
    if header is None and request.method in ("GET", "HEAD"):
        secret = request.cookies.get(COOKIE)
        if secret:
            return f"Bearer {secret}"
    return header


async def authorize(request: Request) -> None:
    """Router-level dependency of every ``/v1`` route."""
    gate: KeyGate = request.app.state.gate
    header = credentials(request)
    accepted = accepted_scopes(request.scope.get("route"))
    if gate.needs_lookup(header):
        key_id = await gate.lookups.run((header, accepted), gate.check, header, accepted)
    else:
        key_id = gate.check(header, accepted)
    if key_id:
        request.scope.setdefault("state", {})["key_id"] = key_id
