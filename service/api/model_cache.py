"""Loaded versions ready to serve, and the live-version lookup, for the prediction routes.

A prediction resolves its version once (``live`` or the pinned number), takes the ``Served`` object for
it, and uses that one object for the numbers and for the ``model`` block of the response, so the block
always describes the version that produced the numbers, even while the live version changes.

Versions are immutable, so a ``Served`` object never goes stale; the LRU here is bounded like the
store's cache, by ``settings.cache_models`` entries and ``settings.cache_bytes`` bytes (each entry sized
by what its loaded version holds in memory). A version larger than the whole byte bound is served but
not kept: the next request loads it again. The live version number is cached for ``settings.live_cache_s`` seconds;
a change made through this process (``PUT /v1/models/{name}/live``, a worker promotion in the same
process) clears it at once. While the catalog is unavailable, the last live version it named stands in
for up to ``settings.stale_ok_s`` (``service.api.stale``).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any

import orjson

from service.api.coalesce import Coalescer
from service.api.stale import CatalogWatch, LastKnown
from service.errors import NotFound
from service.store.cache import LRUCache


@dataclass
class Served:
    name: str
    version: int
    model: Any  # service.engine.FittedModel
    manifest: dict[str, Any]
    block: dict[str, Any]
    inputs: list[str] = field(default_factory=list)
    block_json: bytes = b""
    nbytes: int = 0  # the loaded version's size in memory (service.store.cache.footprint)
    folder: str = ""  # the version's folder and its manifest's SHA-256: where a prediction process loads it
    checksum: str = ""

    def __post_init__(self) -> None:
        self.block_json = orjson.dumps(self.block)


def served_from(name: str, version: int, model: Any, manifest: dict[str, Any], *, folder: str = "",
                checksum: str = "", nbytes: int = 0) -> Served:
    """A loaded version ready to serve (the API process's cache and the prediction processes build it alike)."""
    served = Served(
        name=name, version=int(version), model=model, manifest=manifest,
        block=model_block(name, version, manifest, model),
        inputs=list(model.features) + list(getattr(model.categories, "names", [])),
        nbytes=int(nbytes or 0), folder=folder, checksum=checksum,
    )
    served.nbytes += len(served.block_json)
    return served


def model_block(name: str, version: int, manifest: dict[str, Any], model: Any) -> dict[str, Any]:
    """The ``model`` block of a prediction response: which version answered and how it was tuned."""
    desc = model.describe()
    cv = desc.get("cv") or {}
    return {
        "name": name,
        "version": int(version),
        "created_at": manifest.get("created_at"),
        "basis": desc.get("basis"),
        "penalty": desc.get("penalty"),
        "cv": {"metric": cv.get("metric"), "mean": cv.get("mean"), "splits": cv.get("splits")},
    }


class ModelCache:
    def __init__(self, store, settings, metrics=None, last: LastKnown | None = None):
        self._store = store
        self._last = last if last is not None else LastKnown(0.0, CatalogWatch())
        self._ttl = settings.live_cache_s
        self._metrics = metrics
        self._served = LRUCache(settings.cache_models, settings.cache_bytes)
        self._live: dict[str, tuple[float, int]] = {}
        self.lookups = Coalescer()  # concurrent misses of the same live version or version share one look-up

    # -- live version -------------------------------------------------------------------------------
    def cached_live(self, name: str) -> int | None:
        hit = self._live.get(name)
        if hit is not None and time.monotonic() - hit[0] < self._ttl:
            return hit[1]
        return None

    def live_version(self, name: str) -> int:
        return self.live_version_stale(name, allow_stale=False)[0]

    def live_version_stale(self, name: str, *, allow_stale: bool = True) -> tuple[int, float | None]:
        """The live version and, when the catalog did not answer and its last answer stood in, that
        answer's age in seconds (None when fresh). See ``service.api.stale``."""
        cached = self.cached_live(name)
        if cached is not None:
            return cached, None
        version, age = self._last.lookup(("live", name), lambda: self._store.live_version(name),
                                         f"the live version of model {name!r}", allow_stale=allow_stale)
        if version is None:
            self._store.get_model(name)  # a name with no model at all answers "no model named ..., closest ..."
            raise NotFound(
                f"model {name!r} has no live version yet; wait for its first training job to succeed, pin a version "
                f"with POST /v1/models/{name}/versions/<n>/predictions, or set one with PUT /v1/models/{name}/live.",
                errors=[{"field": "name", "value": name, "message": "no live version"}],
            )
        if age is None:
            self._live[name] = (time.monotonic(), int(version))
        return int(version), age

    def forget_live(self, name: str) -> None:
        self._live.pop(name, None)  # the catalog's last answer stays as the outage fallback

    # -- loaded versions ----------------------------------------------------------------------------
    def cached(self, name: str, version: int) -> Served | None:
        served = self._served.get((name, version))
        if served is not None and self._metrics is not None:
            self._metrics.cache_hit()
        return served

    def load(self, name: str, version: int) -> Served:
        hit = self._served.get((name, version))
        if hit is not None:
            return hit
        if self._metrics is not None:
            self._metrics.cache_misses.inc()
        loaded = self._store.load(name, version)
        served = served_from(name, version, loaded.model, loaded.manifest, nbytes=getattr(loaded, "nbytes", 0),
                             folder=str(self._store.version_folder(name, version)),
                             checksum=getattr(loaded, "checksum", ""))
        self._served.put((name, int(version)), served, served.nbytes)  # not kept when larger than the bound
        return served

    def stats(self) -> dict[str, int]:
        """Entries and bytes held, and the bounds (``LRUCache.stats``)."""
        return self._served.stats()

    def forget(self, name: str, version: int | None = None) -> None:
        self._served.discard_where(lambda k: k[0] == name and (version is None or k[1] == version))
        self.forget_live(name)
