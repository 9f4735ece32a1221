"""Loaded versions ready to serve, and the live-version lookup, for the prediction routes.

A prediction resolves its version once (``live`` or the pinned number), takes the ``Served`` object for
it, and uses that one object for the numbers and for the ``model`` block of the response, so the block
always describes the version that produced the numbers, even while the live version changes.

Versions are immutable, so a ``Served`` object never goes stale; the LRU here is bounded by the same
count as the store's cache. The live version number is cached for ``settings.live_cache_s`` seconds;
a change made through this process (``PUT /v1/models/{name}/live``, a worker promotion in the same
process) clears it at once.
"""

from __future__ import annotations

import threading
import time
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any

import orjson

from service.errors import NotFound


@dataclass
class Served:
    name: str
    version: int
    model: Any  # service.engine.FittedModel
    manifest: dict[str, Any]
    block: dict[str, Any]
    inputs: list[str] = field(default_factory=list)
    block_json: bytes = b""

    def __post_init__(self) -> None:
        self.block_json = orjson.dumps(self.block)


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
        "cv": {"metric": cv.get("metric"), "mean": cv.get("mean"), "folds": cv.get("folds")},
    }


class ModelCache:
    def __init__(self, store, settings, metrics=None):
        self._store = store
        self._ttl = settings.live_cache_s
        self._limit = settings.cache_models
        self._metrics = metrics
        self._lock = threading.Lock()
        self._served: OrderedDict[tuple[str, int], Served] = OrderedDict()
        self._live: dict[str, tuple[float, int]] = {}

    # -- live version -------------------------------------------------------------------------------
    def cached_live(self, name: str) -> int | None:
        hit = self._live.get(name)
        if hit is not None and time.monotonic() - hit[0] < self._ttl:
            return hit[1]
        return None

    def live_version(self, name: str) -> int:
        cached = self.cached_live(name)
        if cached is not None:
            return cached
        version = self._store.live_version(name)
        if version is None:
            self._store.get_model(name)  # a name with no model at all answers "no model named ..., closest ..."
            raise NotFound(
                f"model {name!r} has no live version yet; wait for its first training job to succeed, pin a version "
                f"with POST /v1/models/{name}/versions/<n>/predict, or set one with PUT /v1/models/{name}/live.",
                errors=[{"field": "name", "value": name, "message": "no live version"}],
            )
        self._live[name] = (time.monotonic(), int(version))
        return int(version)

    def forget_live(self, name: str) -> None:
        self._live.pop(name, None)

    # -- loaded versions ----------------------------------------------------------------------------
    def cached(self, name: str, version: int) -> Served | None:
        served = self._served.get((name, version))
        if served is not None:
            if self._metrics is not None:
                self._metrics.cache_hits.inc()
            with self._lock:
                if (name, version) in self._served:
                    self._served.move_to_end((name, version))
        return served

    def load(self, name: str, version: int) -> Served:
        hit = self._served.get((name, version))
        if hit is not None:
            return hit
        if self._metrics is not None:
            self._metrics.cache_misses.inc()
        loaded = self._store.load(name, version)
        manifest = loaded.manifest
        model = loaded.model
        served = Served(
            name=name, version=int(version), model=model, manifest=manifest,
            block=model_block(name, version, manifest, model),
            inputs=list(model.features) + list(getattr(model.categories, "names", [])),
        )
        with self._lock:
            self._served[(name, int(version))] = served
            while len(self._served) > self._limit:
                self._served.popitem(last=False)
        return served

    def forget(self, name: str, version: int | None = None) -> None:
        with self._lock:
            for key in [k for k in self._served if k[0] == name and (version is None or k[1] == version)]:
                del self._served[key]
        self.forget_live(name)
