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
    with store.engine.connect() as conn:
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
