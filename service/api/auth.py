"""API keys: ``Authorization: Bearer <key>`` with scopes ``predict``, ``train``, ``admin`` and ``metrics``.

Each ``/v1`` route declares which scopes may call it in its OpenAPI ``security`` requirement (one
requirement object per accepted scope, so any one of them suffices, as OpenAPI 3.1 defines). The
router-level dependency ``authorize`` reads that same declaration from the matched route, so the
document and the enforcement cannot drift apart. A route that declares nothing requires ``admin``
(fail closed).

When no active key exists at all, the routes are open: ``service.api.server.run`` then refuses to
bind anything but a loopback address. Key checks and the "does any key exist" answer are cached per
process for ``settings.auth_cache_s`` seconds.

Closed stays closed: once the gate has seen an active key (or the server started with keys, see
``KeyGate.close``), it never opens again in that process. If every key then disappears (revoked with
``tikhon keys revoke --local``, or the catalog lost its rows), each guarded route answers 401 until a
new key is made (``tikhon keys create --local``); the health routes stay open. The last active admin
key cannot be revoked over HTTP at all (``service.api.routes.admin``).
"""

from __future__ import annotations

import functools
import threading
import time
from typing import Any, Iterable

from fastapi import Request

from service.api.stale import CatalogWatch, LastKnown, note_stale
from service.api.coalesce import Coalescer
from service.errors import Forbidden, Unauthorized

SCHEME = "bearerKey"
SCOPES = ("predict", "train", "admin", "metrics")

SECURITY_SCHEME = {
    "type": "http",
    "scheme": "bearer",
    "description": "An API key made with `tikhon keys create --scope predict|train|admin|metrics`, sent as "
    "`Authorization: Bearer <key>`. While no key exists the server listens on loopback only and needs none: "
    "its /openapi.json then declares no requirement on the operations (a generated client calls without a "
    "token). Once a key exists the document requires this scheme, each operation with the scopes it accepts "
    "(also listed in the operation's x-tikhon-scopes). Send no Authorization header at all rather than an "
    "empty token.",
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
METRICS = scopes("metrics", "admin")  # the Prometheus scrape (/metrics): a scraper's key reads nothing else


_ACCEPTED: dict[int, tuple[Any, frozenset[str]]] = {}


def accepted_scopes(route: Any) -> frozenset[str]:
    """The scopes a route declares (its OpenAPI security requirements), read once per route object."""
    hit = _ACCEPTED.get(id(route))
    if hit is not None and hit[0] is route:
        return hit[1]
    found = _declared_scopes(route)
    if route is not None:
        _ACCEPTED[id(route)] = (route, found)
    return found


def _declared_scopes(route: Any) -> frozenset[str]:
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
    """Answers "may this Authorization header call a route accepting these scopes?" using the store's keys.

    While the catalog is unavailable, reads and predictions (``allow_stale``) are checked against the
    catalog's last answers for up to ``stale_ok_s`` (see ``service.api.stale``); everything else gets the
    503 ``catalog-unavailable`` problem."""

    def __init__(self, keys, ttl_s: float, last: LastKnown | None = None):
        self._keys = keys
        self._ttl = ttl_s
        self._last = last if last is not None else LastKnown(0.0, CatalogWatch())
        self._lock = threading.Lock()
        self._any: tuple[float, bool] | None = None
        self._verified: dict[str, tuple[float, tuple[frozenset[str], str] | None]] = {}
        self._closed = False  # keys are required for good (see the module docstring)
        self.lookups = Coalescer()  # concurrent checks of the same header share one catalog look-up

    def close(self) -> None:
        """Require keys from now on, whatever the catalog says later (a server started with keys)."""
        self._closed = True

    @property
    def closed(self) -> bool:
        return self._closed

    def forget(self) -> None:
        with self._lock:
            self._any = None
            self._verified.clear()
        self._last.forget_kind("any", "key")

    def _any_active(self, allow_stale: bool = False) -> tuple[bool, float | None]:
        now = time.monotonic()
        cached = self._any
        if cached is not None and now - cached[0] < self._ttl:
            return cached[1], None
        value, age = self._last.lookup(("any",), lambda: bool(self._keys.any_active()), "whether any API key exists",
                                       allow_stale=allow_stale)
        if value:
            self._closed = True
        if age is None:
            self._any = (now, value)
        return value, age

    def _scopes_of(self, secret: str, allow_stale: bool = False) -> tuple[tuple[frozenset[str], str] | None, float | None]:
        now = time.monotonic()
        cached = self._verified.get(secret)
        if cached is not None and now - cached[0] < self._ttl:
            return cached[1], None

        def fetch() -> tuple[frozenset[str], str] | None:
            row = self._keys.verify(secret)
            return None if row is None else (_scope_set(row.get("scopes")), str(row.get("key_id", "")))

        value, age = self._last.lookup(("key", secret), fetch, "this API key", allow_stale=allow_stale)
        if age is None:
            with self._lock:
                if len(self._verified) > 10_000:
                    self._verified.clear()
                self._verified[secret] = (now, value)
        return value, age

    def needs_lookup(self, header: str | None) -> bool:
        now = time.monotonic()
        if self._any is None or now - self._any[0] >= self._ttl:
            return True
        if not self._any[1] and not self._closed:
            return False
        secret = _bearer(header)
        if secret is None:
            return False
        cached = self._verified.get(secret)
        return cached is None or now - cached[0] >= self._ttl

    def check(self, header: str | None, accepted: Iterable[str]) -> str | None:
        """Raise Unauthorized/Forbidden, or return the key id (None when no key is needed)."""
        return self.check_stale(header, accepted, allow_stale=False)[0]

    def check_stale(self, header: str | None, accepted: Iterable[str], *,
                    allow_stale: bool = True) -> tuple[str | None, float | None]:
        """As ``check``, returning ``(key id, age)``: ``age`` is None when the catalog answered (or a fresh
        cache did), else the age in seconds of the stale answers the decision rests on."""
        accepted = frozenset(accepted)
        any_active, age = self._any_active(allow_stale)
        if not any_active and not self._closed:
            return None, age
        secret = _bearer(header)
        found = None
        if secret is not None:
            # looked up even while "no active key" is cached: a key made since (on the server's machine, to
            # reopen a closed server) works at once, not after the cache's seconds
            found, key_age = self._scopes_of(secret, allow_stale)
            if key_age is not None:
                age = max(age or 0.0, key_age)
        if not any_active and found is None:
            raise Unauthorized(
                "This server requires API keys but no active key exists any more (all were revoked or the catalog "
                "lost them); make one on the server's machine with 'tikhon keys create --local --scope admin'."
            )
        if secret is None:
            raise Unauthorized(
                "This route needs an API key: send 'Authorization: Bearer <key>' with a key holding one of the "
                f"scopes {sorted(accepted)}; an operator makes one with 'tikhon keys create --scope ...'."
            )
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
        return key_id, age


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


def raw_header(scope: dict, name: bytes) -> str | None:
    """The first value of header ``name`` (lower-case bytes) as ``request.headers.get`` gives it, read from the
    ASGI scope without building the headers mapping."""
    for key, value in scope["headers"]:
        if key == name:
            return value.decode("latin-1")
    return None


def credentials(request: Request) -> str | None:
    """The Authorization header, or for GET/HEAD without one, the login cookie as a bearer header."""
    header = raw_header(request.scope, b"authorization")
    if header is None and request.method in ("GET", "HEAD"):
        secret = request.cookies.get(COOKIE)
        if secret:
            return f"Bearer {secret}"
    return header


async def authorize(request: Request) -> None:
    """Router-level dependency of every ``/v1`` route."""
    gate: KeyGate = request.app.state.gate
    header = credentials(request)
    route = request.scope.get("route")
    accepted = accepted_scopes(route)
    # Reads and predictions may rest on the catalog's last answers during an outage; changes never do.
    allow_stale = request.method in ("GET", "HEAD") or str(getattr(route, "path", "")).endswith("/predictions")
    if gate.needs_lookup(header):
        key_id, age = await gate.lookups.run((header, accepted, allow_stale), functools.partial(
            gate.check_stale, header, accepted, allow_stale=allow_stale))
    else:
        key_id, age = gate.check_stale(header, accepted, allow_stale=allow_stale)
    if age is not None:
        note_stale(request, age)
    if key_id:
        request.scope.setdefault("state", {})["key_id"] = key_id
