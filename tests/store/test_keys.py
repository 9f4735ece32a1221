"""API keys: shown once, stored hashed, verified against the hash, revocable."""

from __future__ import annotations

import hashlib

import pytest
import sqlalchemy as sa

from service.errors import InvalidSpec, NotFound
from service.store.schema import api_keys as keys_t


def test_create_verify_revoke(store):
    assert store.keys.any_active() is False
    key_id, secret = store.keys.create(["predict", "train"], "nightly retrain")
    assert secret.startswith(f"tikhon_{key_id}_") and len(secret) == len("tikhon_") + 12 + 1 + 43
    assert store.keys.any_active() is True
    info = store.keys.verify(secret)
    assert info["key_id"] == key_id and info["scopes"] == ["predict", "train"] and info["label"] == "nightly retrain"
    assert store.keys.verify(secret[:-1] + ("A" if secret[-1] != "A" else "B")) is None
    assert store.keys.verify("tikhon_000000000000_" + "x" * 43) is None
    assert store.keys.verify("Bearer " + secret) is None
    assert store.keys.verify("") is None and store.keys.verify(None) is None
    listed = store.keys.list()
    assert listed[0]["key_id"] == key_id and listed[0]["active"] and "secret" not in str(listed)
    assert store.keys.revoke(key_id)["active"] is False
    assert store.keys.verify(secret) is None
    assert store.keys.any_active() is False
    assert store.keys.revoke(key_id)["active"] is False  # idempotent
    with pytest.raises(NotFound):
        store.keys.revoke("ffffffffffff")


def test_only_the_hash_is_stored(store):
    key_id, secret = store.keys.create(["admin"], "ops")
    with store.db.sql.connect() as conn:
        row = conn.execute(sa.select(keys_t).where(keys_t.c.key_id == key_id)).one()
    assert row.secret_sha256 == hashlib.sha256(secret.encode()).hexdigest()
    assert secret.split("_", 2)[2] not in str(tuple(row))


def test_keys_from_another_store_instance(store):
    from service.store import Store

    key_id, secret = store.keys.create(["predict"], "")
    other = Store(store.settings, catalog_ttl_s=0)
    assert other.keys.verify(secret)["key_id"] == key_id
    store.keys.revoke(key_id)
    assert other.keys.verify(secret) is None  # no cache (ttl 0): revocation seen at once
    other.close()


@pytest.mark.parametrize("scopes", [[], ["root"], ["predict", "everything"], None])
def test_bad_scopes(store, scopes):
    with pytest.raises(InvalidSpec, match="scopes"):
        store.keys.create(scopes, "x")


def test_the_last_admin_key_is_kept_when_asked(store):
    """``revoke(keep_last_admin=True)`` (what the HTTP route uses) refuses the last active admin key with a
    Conflict naming ``tikhon keys revoke --local``; without the flag (the local command) it goes. A
    ``metrics`` key is a valid scope and does not count as an admin key."""
    from service.errors import Conflict

    scraper, _ = store.keys.create(["metrics"], "scraper")
    first, _ = store.keys.create(["admin"], "one")
    second, _ = store.keys.create(["predict", "admin"], "two")
    assert store.keys.revoke(first, keep_last_admin=True)["active"] is False  # another admin key remains
    with pytest.raises(Conflict, match=f"last active admin key.*tikhon keys revoke --local {second}"):
        store.keys.revoke(second, keep_last_admin=True)
    assert store.keys.revoke(scraper, keep_last_admin=True)["active"] is False  # not an admin key
    assert store.keys.revoke(first, keep_last_admin=True)["active"] is False  # already revoked: idempotent
    assert store.keys.revoke(second)["active"] is False  # the local command's way
    assert store.keys.any_active() is False


def test_two_concurrent_revocations_keep_one_admin_key(store):
    """Two threads revoke the last two admin keys at once (HTTP route's flag): exactly one succeeds."""
    import threading

    from service.errors import Conflict

    ids = [store.keys.create(["admin"], f"admin {i}")[0] for i in range(2)]
    barrier = threading.Barrier(2)
    outcome: dict[str, str] = {}

    def revoke(key_id: str) -> None:
        barrier.wait()
        try:
            store.keys.revoke(key_id, keep_last_admin=True)
            outcome[key_id] = "revoked"
        except Conflict:
            outcome[key_id] = "kept"

    threads = [threading.Thread(target=revoke, args=(k,)) for k in ids]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert sorted(outcome.values()) == ["kept", "revoked"], outcome
    assert [k["active"] for k in store.keys.list()].count(True) == 1
