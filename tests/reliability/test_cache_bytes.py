"""TIKHON_CACHE_BYTES bounds every cache of loaded versions in bytes, not only in count (issue 11, item 14).

A version larger than the whole bound is served but not kept: each request loads it again (seen in the
store's miss counter), and neither the store's cache nor the API's cache of versions ready to serve ever
holds more bytes than the bound. Entry sizes are what a loaded version holds in memory; the reference
here is NumPy's own ``nbytes`` of the arrays in the version's ``arrays.npz``, read independently.
"""

from __future__ import annotations

from pathlib import Path

import httpx
import numpy as np

import livesvc  # tests/livesvc.py

MIB = 1 << 20
BOUND = 256 * 1024  # TIKHON_CACHE_BYTES for the first test: less than the big version, more than the small


def _file_arrays_nbytes(store_root: Path, name: str, version: int) -> int:
    with np.load(store_root / name / str(version) / "arrays.npz", allow_pickle=False) as npz:
        return sum(npz[k].nbytes for k in npz.files)


def test_a_version_larger_than_the_bound_is_served_but_not_kept(tmp_path, rk):
    from service.api.server import build

    settings = livesvc.make_settings(tmp_path, cache_bytes=BOUND, cache_models=64)
    app, store, _ = build(settings, embedded_worker=False)
    try:
        big = rk.publish_demo(store, "big", n=40_000, seed=51)  # CV+ keeps a residual per training row
        rk.publish_demo(store, "small", n=200, seed=52)
        big_bytes = _file_arrays_nbytes(Path(settings.store), "big", big["version"])
        assert big_bytes > BOUND  # the premise: its arrays alone exceed the bound
        store._cache.discard_where(lambda k: True)  # publish_demo loaded nothing, but start from empty anyway
        row = {"rows": [{"flow_lps": 50.0, "head_m": 30.0}]}
        with livesvc.running(app) as base, httpx.Client(base_url=base, timeout=120) as c:
            answers = []
            for _ in range(3):
                before = store.cache_stats()["misses"]
                r = c.post("/v1/models/big/predictions", json=row)
                assert r.status_code == 200, r.text
                answers.append(r.json()["predictions"][0]["value"])
                # loaded from the store on every request: neither cache kept it
                assert store.cache_stats()["misses"] == before + 1
            assert answers[0] == answers[1] == answers[2]
            assert app.state.models.stats()["items"] == 0 and store.cache_stats()["items"] == 0

            # a small version is kept by both, and the bytes held stay under the bound
            assert c.post("/v1/models/small/predictions", json=row).status_code == 200
            before = store.cache_stats()["misses"]
            assert c.post("/v1/models/small/predictions", json=row).status_code == 200
            assert store.cache_stats()["misses"] == before  # served from the API's cache
            for stats in (app.state.models.stats(), store.cache_stats()):
                assert stats["items"] == 1 and 0 < stats["bytes"] <= BOUND, stats
    finally:
        store.close()


def test_entries_are_sized_by_what_the_loaded_version_holds(tmp_path, rk):
    from service.store.cache import LRUCache, footprint

    settings = livesvc.make_settings(tmp_path, cache_bytes=64 * MIB)
    from service.store import Store

    with Store(settings) as store:
        row = rk.publish_demo(store, "mid", n=20_000, seed=53)
        loaded = store.load("mid", row["version"])
        on_file = _file_arrays_nbytes(Path(settings.store), "mid", row["version"])
        assert loaded.nbytes >= on_file  # at least the arrays NumPy reads from the file
        assert store.cache_stats()["bytes"] == loaded.nbytes
    # footprint counts a shared buffer once, views by their base, and what objects and containers hold
    a = np.zeros(100_000)
    assert footprint([a, a, a[10:], {"x": a.reshape(1000, 100)}]) < 1.01 * a.nbytes + 4096
    assert footprint([a, np.ones(50_000)]) >= a.nbytes + 50_000 * 8

    class Holder:
        __slots__ = ("arr",)

        def __init__(self, arr):
            self.arr = arr

    assert footprint(Holder(a)) >= a.nbytes
    cache = LRUCache(10, 1000)
    assert cache.put("big", object(), 1001) is False and len(cache) == 0  # larger than the whole bound
    assert cache.put("a", 1, 600) and cache.put("b", 2, 600)  # b evicts a: 1200 > 1000
    assert "a" not in cache and cache.stats()["bytes"] == 600
