"""A catalog outage seen by one server: predictions keep answering on the catalog's last answers for a
bounded time (``TIKHON_STALE_OK_S``), marked ``Tikhon-Catalog: stale``; changes answer 503 with
``Retry-After`` and the ``catalog-unavailable`` problem, never 507.

The outage is made by pointing the store's database engines at a loopback port where nothing listens
(connection refused, as when PostgreSQL is stopped); putting the real engine back ends it. The
two-replica outage on a real PostgreSQL that is stopped and started is in
``tests/reliability/test_catalog_outage.py``.
"""

from __future__ import annotations

import contextlib
import socket
import time

import httpx
import pytest

from service.errors import CatalogUnavailable, StorageFailure

NAME = "pumps"


def _closed_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextlib.contextmanager
def catalog_down(store):
    """Every catalog query of ``store`` fails with "connection refused" until the block ends."""
    from service.store.catalog import create_catalog_engine

    dead = create_catalog_engine(f"postgresql+psycopg://nobody@127.0.0.1:{_closed_port()}/tikhon")
    holders = [(store.db, "sql")]  # shared by the store, its jobs and keys, and the monitoring counts
    saved = [getattr(o, a) for o, a in holders]
    for o, a in holders:
        setattr(o, a, dead)
    # The store's own one-second catalog caches are treated as expired, as they are a second into an outage.
    with store._lock:
        store._live.clear()
        store._rows.clear()
    with store.keys._lock:
        store.keys._verified.clear()
        store.keys._any = None
    try:
        yield
    finally:
        for (o, a), v in zip(holders, saved):
            setattr(o, a, v)
        dead.dispose()


def _publish(store, kit, seed=1):
    from service.engine import tune

    body, arrays = tune(kit.pump_table(200, seed), kit.SPEC).to_artifact()
    row = store.publish(NAME, body, arrays)
    store.set_live(NAME, row["version"], actor="test", reason="fixture")
    return row["version"]


ROWS = {"rows": [{"flow_lps": 40.0, "head_m": 25.0}, {"flow_lps": 80.0, "head_m": 45.0}]}


def test_predictions_survive_an_outage_and_changes_answer_503(tmp_path, kit):
    with kit.service(tmp_path, worker=False) as (base, store, settings):
        assert settings.stale_ok_s == 300.0  # the documented default
        v1 = _publish(store, kit)
        v2 = _publish(store, kit, seed=2)  # v2 live, v1 pinned below
        _, admin = store.keys.create(["admin"], "ops")
        _, pred = store.keys.create(["predict"], "app")
        revoked_id, revoked = store.keys.create(["predict"], "old")
        store.keys.revoke(revoked_id)
        _, never_seen = store.keys.create(["predict"], "never used before the outage")
        hp = {"Authorization": f"Bearer {pred}"}
        ha = {"Authorization": f"Bearer {admin}"}
        with httpx.Client(base_url=base, timeout=30) as c:
            before = c.post(f"/v1/models/{NAME}/predictions", json=ROWS, headers=hp)
            pinned_before = c.post(f"/v1/models/{NAME}/versions/{v1}/predictions", json=ROWS, headers=hp)
            assert before.status_code == 200 and pinned_before.status_code == 200
            assert "tikhon-catalog" not in before.headers
            assert c.post(f"/v1/models/{NAME}/predictions", json=ROWS,
                          headers={"Authorization": f"Bearer {revoked}"}).status_code == 401
            assert c.get("/v1/models", headers=ha).status_code == 200  # the admin key is known too

            with catalog_down(store):
                for _ in range(3):
                    r = c.post(f"/v1/models/{NAME}/predictions", json=ROWS, headers=hp)
                    assert r.status_code == 200, r.text
                    # Same version and numbers as before the outage, marked stale with an age in seconds.
                    assert r.json() == before.json()
                    assert r.json()["model"]["version"] == v2
                    kind, _, age = r.headers["tikhon-catalog"].partition("; age=")
                    assert kind == "stale" and 0 <= int(age) <= 300
                p = c.post(f"/v1/models/{NAME}/versions/{v1}/predictions", json=ROWS, headers=hp)
                assert p.status_code == 200 and p.json() == pinned_before.json()
                assert p.headers["tikhon-catalog"].startswith("stale; age=")

                # A key revoked before the outage stays refused; one never checked here cannot be checked.
                assert c.post(f"/v1/models/{NAME}/predictions", json=ROWS,
                              headers={"Authorization": f"Bearer {revoked}"}).status_code == 401
                unknown = c.post(f"/v1/models/{NAME}/predictions", json=ROWS,
                                 headers={"Authorization": f"Bearer {never_seen}"})
                assert unknown.status_code == 503
                assert unknown.json()["type"] == "/problems/catalog-unavailable"

                # Changes: 503 + Retry-After + their own problem type (RFC 9110 section 15.6.4: 503 is a
                # temporary overload or maintenance; section 10.2.3: Retry-After), never 507.
                writes = [
                    c.put(f"/v1/models/{NAME}/live", json={"version": v1, "reason": "during outage"}, headers=ha),
                    c.post(f"/v1/models/{NAME}/trainings", json={"spec": kit.SPEC, "source": "x.csv"}, headers=ha),
                    c.post("/v1/keys", json={"scopes": ["predict"], "label": "x"}, headers=ha),
                    c.get("/v1/models", headers=ha),
                ]
                for w in writes:
                    assert w.status_code == 503, (w.request.url, w.status_code, w.text)
                    assert w.headers["content-type"].startswith("application/problem+json")
                    assert int(w.headers["retry-after"]) > 0
                    body = w.json()
                    assert body["type"] == "/problems/catalog-unavailable" and body["status"] == 503
                    assert "does not answer" in body["detail"]
                ready = c.get("/readyz")
                assert ready.status_code == 503 and int(ready.headers["retry-after"]) > 0
                # Prometheus text format: the stale answers above (3 live, 1 pinned, the revoked key's 401), counted.
                from prometheus_client.parser import text_string_to_metric_families

                samples = {smp.name: smp.value for fam in text_string_to_metric_families(c.get("/metrics", headers=ha).text)
                           for smp in fam.samples}
                assert samples["tikhon_catalog_stale_answers_total"] == 5.0

            # The catalog is back: fresh answers, no stale marker, and changes work again. A replica tries the
            # catalog again at most once a second while it is down (CatalogWatch.retry_s), so wait that long.
            time.sleep(1.1)
            after = c.post(f"/v1/models/{NAME}/predictions", json=ROWS, headers=hp)
            assert after.status_code == 200 and "tikhon-catalog" not in after.headers
            assert after.json() == before.json()
            assert c.put(f"/v1/models/{NAME}/live", json={"version": v1, "reason": "after"}, headers=ha).status_code == 200
            assert c.post(f"/v1/models/{NAME}/predictions", json=ROWS, headers=hp).json()["model"]["version"] == v1
            assert c.get("/readyz").status_code == 200


def test_a_key_revoked_elsewhere_stops_working_when_the_catalog_returns(tmp_path, kit):
    """Stale knowledge never outlives the outage: once the catalog answers, its answer counts (here the
    app's auth cache is 0 s, so the bound is the store's one-second catalog cache)."""
    import time

    from service.store import Store

    with kit.service(tmp_path, worker=False) as (base, store, settings):
        _publish(store, kit)
        store.keys.create(["admin"], "ops")  # keys stay required after the revocation below
        key_id, pred = store.keys.create(["predict"], "app")
        hp = {"Authorization": f"Bearer {pred}"}
        with httpx.Client(base_url=base, timeout=30) as c:
            assert c.post(f"/v1/models/{NAME}/predictions", json=ROWS, headers=hp).status_code == 200
            with catalog_down(store):
                r = c.post(f"/v1/models/{NAME}/predictions", json=ROWS, headers=hp)
                assert r.status_code == 200 and r.headers["tikhon-catalog"].startswith("stale")
                # Revoked meanwhile through another replica that still reaches the catalog.
                with Store(settings) as other:
                    other.keys.revoke(key_id)
                assert c.post(f"/v1/models/{NAME}/predictions", json=ROWS, headers=hp).status_code == 200  # stale
            time.sleep(1.2)  # past the store's one-second cache (the documented bound), not a timing check
            r = c.post(f"/v1/models/{NAME}/predictions", json=ROWS, headers=hp)
            assert r.status_code == 401 and "tikhon-catalog" not in r.headers


def test_stale_ok_zero_means_no_stale_answers(tmp_path, kit):
    with kit.service(tmp_path, worker=False, stale_ok_s=0) as (base, store, settings):
        _publish(store, kit)
        with httpx.Client(base_url=base, timeout=30) as c:
            assert c.post(f"/v1/models/{NAME}/predictions", json=ROWS).status_code == 200
            with catalog_down(store):
                r = c.post(f"/v1/models/{NAME}/predictions", json=ROWS)
                assert r.status_code == 503 and r.json()["type"] == "/problems/catalog-unavailable"
                assert "TIKHON_STALE_OK_S" in r.json()["detail"]


def test_stale_knowledge_has_a_bound():
    """``LastKnown`` with a hand-driven clock: served up to stale_ok_s old, refused beyond, and one
    catalog attempt per retry interval while the catalog is down."""
    from service.api.stale import CatalogWatch, LastKnown

    now = [100.0]
    clock = lambda: now[0]  # noqa: E731
    watch = CatalogWatch(1.0, clock=clock)
    last = LastKnown(300.0, watch, clock=clock)
    calls = []

    def up():
        calls.append("up")
        return 7

    def down():
        calls.append("down")
        raise CatalogUnavailable("the catalog does not answer.")

    assert last.lookup("k", up, "k", allow_stale=True) == (7, None)
    now[0] += 10
    assert last.lookup("k", down, "k", allow_stale=True) == (7, 10.0)
    with pytest.raises(CatalogUnavailable):  # changes never rest on stale knowledge
        last.lookup("k", down, "k", allow_stale=False)
    n = len(calls)
    now[0] += 0.5  # within the retry interval: no new attempt, the stale answer at once
    assert last.lookup("k", down, "k", allow_stale=True) == (7, 10.5)
    assert len(calls) == n
    now[0] += 289.5  # exactly at the bound: still served
    assert last.lookup("k", down, "k", allow_stale=True) == (7, 300.0)
    now[0] += 0.01  # beyond it: refused, saying why
    with pytest.raises(CatalogUnavailable, match="TIKHON_STALE_OK_S"):
        last.lookup("k", down, "k", allow_stale=True)
    with pytest.raises(CatalogUnavailable, match="no earlier answer"):
        last.lookup("other", down, "other", allow_stale=True)
    now[0] += 2
    assert last.lookup("k", up, "k", allow_stale=True) == (7, None)  # back: fresh again, outage over
    assert not watch.down


def test_unreachable_catalog_is_503_but_a_full_disk_stays_507():
    """The error classification at the store boundary (``service.store.util.catalog_errors``)."""
    import sqlite3

    from sqlalchemy.exc import OperationalError

    from service.problems import status_for
    from service.store.util import catalog_errors

    def raised(orig):
        with pytest.raises(StorageFailure) as info, catalog_errors("reading", "sqlite:///x"):
            raise OperationalError("SELECT 1", {}, orig)
        return info.value

    refused = raised(Exception('connection failed: connection to server at "127.0.0.1", port 5432 failed: '
                               "Connection refused"))
    assert isinstance(refused, CatalogUnavailable) and status_for(refused) == 503
    full = raised(sqlite3.OperationalError("database or disk is full"))
    assert not isinstance(full, CatalogUnavailable) and status_for(full) == 507
