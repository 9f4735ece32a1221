"""Jobs and keys see the catalog through one small object (``CatalogAccess``), never the whole ``Store``.

What they share with the store is the database, its label for messages, its id and how long a cached answer
lasts; the checks below use each of them through ``Jobs``/``Keys`` built on that object alone.
"""

from __future__ import annotations

from service.settings import Settings
from service.store import Store, layout
from service.store.catalog import CatalogAccess
from service.store.jobs import Jobs
from service.store.keys import Keys


def test_jobs_and_keys_hold_the_catalog_access_not_the_store(store):
    assert store.jobs._db is store.db and store.keys._db is store.db
    for part in (store.jobs, store.keys):
        assert not any(isinstance(v, Store) for v in vars(part).values())
    assert store.jobs.folder == store.root / layout.JOBS_DIR


def test_keys_cache_for_the_catalogs_lifetime_and_no_longer(store):
    key_id, secret = store.keys.create(["predict"], "dashboard")
    # a second process's view of the same catalog: its own Keys with a long and a zero cache lifetime
    patient = Keys(CatalogAccess(store.db.sql, store.db.label, ttl_s=3600.0))
    eager = Keys(CatalogAccess(store.db.sql, store.db.label, ttl_s=0.0))
    assert patient.verify(secret)["key_id"] == key_id and eager.verify(secret)["key_id"] == key_id
    store.keys.revoke(key_id)
    assert patient.verify(secret)["key_id"] == key_id  # cached: within the documented lifetime
    assert eager.verify(secret) is None  # no lifetime: asks the catalog again


def test_jobs_built_on_a_catalog_access_share_the_stores_queue(store, tmp_path):
    other = Jobs(CatalogAccess(store.db.sql, store.db.label, ttl_s=1.0, catalog_id=store.catalog_id),
                 store.root / layout.JOBS_DIR)
    job, created = other.submit("pumps", {"spec": {"target": "y"}, "promote": "always"})
    assert created and store.jobs.get(job["id"])["state"] == "queued"
    assert [j["id"] for j in store.jobs.list(name="pumps")] == [job["id"]]


def test_a_store_opened_with_a_zero_lifetime_passes_it_to_its_keys(tmp_path):
    with Store(Settings(store=tmp_path / "s", data_dir=tmp_path), catalog_ttl_s=0.0) as a, \
            Store(Settings(store=tmp_path / "s", data_dir=tmp_path)) as b:
        assert a.db.ttl_s == 0.0 and b.db.ttl_s == 1.0
        key_id, secret = b.keys.create(["admin"], "ops")
        assert a.keys.verify(secret)["key_id"] == key_id
        b.keys.revoke(key_id)
        assert a.keys.verify(secret) is None  # b's change, seen at once by a store that caches nothing
