"""Publishing, loading, listing, live versions, history and retention on both catalog backends."""

from __future__ import annotations

import time

import numpy as np
import pytest
import sqlalchemy as sa

from service.errors import Conflict, InvalidSpec, NotFound
from service.settings import Settings
from service.store import Store


def test_publish_numbers_versions_from_one_and_lists_them(store, kit):
    for seed in range(3):
        body, arrays = kit.linear_artifact(5, seed=seed)
        row = store.publish("pump-7", body, arrays, job_id=f"{seed:032x}")
        assert row["version"] == seed + 1
        assert row["name"] == "pump-7" and row["job_id"] == f"{seed:032x}" and row["live"] is False
        assert row["summary"] == {"cv_summary": {"terms": 5, "seed": seed}}  # the engine's keys only
    assert [v["version"] for v in store.list_versions("pump-7")] == [1, 2, 3]
    assert store.list_models() == [{
        "name": "pump-7", "live_version": None, "newest_version": 3, "versions": 3,
        "created_at": store.list_models()[0]["created_at"], "updated_at": store.list_models()[0]["updated_at"],
    }]
    assert store.get_model("pump-7")["versions"] == 3
    # A second model counts on its own.
    body, arrays = kit.linear_artifact(2)
    assert store.publish("pump-8", body, arrays)["version"] == 1
    assert [m["name"] for m in store.list_models()] == ["pump-7", "pump-8"]


def test_load_predicts_what_was_published(store, kit):
    body, arrays = kit.linear_artifact(6, seed=11, intercept=-2.25)
    store.publish("m", body, arrays)
    loaded = store.load("m", 1)
    X = np.random.default_rng(5).normal(size=(30, 6))
    expected = X @ arrays["coef"] + -2.25
    assert loaded.model.predict(X).tobytes() == expected.tobytes()
    assert loaded.version == 1 and loaded.name == "m"
    assert loaded.manifest["training"] == body
    assert loaded.checksum == store.get_version("m", 1)["checksum"]


def test_not_found_messages(store, kit):
    with pytest.raises(NotFound, match="no model named 'nope' exists"):
        store.load("nope", 1)
    with pytest.raises(NotFound, match="no model named .nope. exists"):
        store.list_versions("nope")
    with pytest.raises(NotFound):
        store.history("nope")
    assert store.live_version("nope") is None
    body, arrays = kit.linear_artifact()
    store.publish("m", body, arrays)
    with pytest.raises(NotFound, match=r"has no version 4 \(its newest version number is 1\)"):
        store.load("m", 4)
    for bad in (0, -1, "1", 1.0, True, None):
        with pytest.raises(NotFound):
            store.load("m", bad)
    assert store.load("m", np.int64(1)).version == 1


def test_set_live_and_history(store, kit):
    for seed in range(3):
        store.publish("m", *kit.linear_artifact(seed=seed))
    assert store.live_version("m") is None
    e1 = store.set_live("m", 1, actor="alice", reason="first model")
    assert (e1["from_version"], e1["to_version"], e1["changed"]) == (None, 1, True)
    e2 = store.set_live("m", 3, actor="worker:a1", reason="promoted if_better",
                        details={"new_rmse": 0.5, "live_rmse": 0.7})
    assert store.live_version("m") == 3
    same = store.set_live("m", 3, actor="bob", reason="again")
    assert same["changed"] is False
    hist = store.history("m")
    assert [(h["from_version"], h["to_version"], h["actor"], h["reason"]) for h in hist] == [
        (None, 1, "alice", "first model"), (1, 3, "worker:a1", "promoted if_better")]
    assert hist[1]["details"] == {"new_rmse": 0.5, "live_rmse": 0.7}
    assert hist[0]["id"] == e1["id"] and hist[1]["id"] == e2["id"]
    assert [v["live"] for v in store.list_versions("m")] == [False, False, True]
    with pytest.raises(NotFound):
        store.set_live("m", 9, actor="a", reason="r")
    with pytest.raises(InvalidSpec, match="actor"):
        store.set_live("m", 2, actor="", reason="r")
    assert len(store.history("m")) == 2


def test_history_is_append_only_in_the_database(store, kit):
    store.publish("m", *kit.linear_artifact())
    store.set_live("m", 1, actor="a", reason="r")
    for statement in ("UPDATE history SET reason = 'rewritten'", "DELETE FROM history"):
        with pytest.raises(sa.exc.DatabaseError, match="append-only"):
            with store.db.sql.begin() as conn:
                conn.execute(sa.text(statement))
    assert store.history("m")[0]["reason"] == "r"


def test_delete_is_refused_while_live_and_numbers_are_never_reused(store, kit):
    for seed in range(3):
        store.publish("m", *kit.linear_artifact(seed=seed))
    store.set_live("m", 2, actor="a", reason="r")
    with pytest.raises(Conflict, match="version 2 of model 'm' is live"):
        store.delete_version("m", 2)
    assert store.delete_version("m", 3) == {"name": "m", "version": 3, "deleted": True}
    assert not (store.root / "m" / "3").exists()
    with pytest.raises(NotFound, match="was deleted at"):
        store.load("m", 3)
    with pytest.raises(NotFound, match="already deleted"):
        store.delete_version("m", 3)
    with pytest.raises(NotFound, match="was deleted"):
        store.set_live("m", 3, actor="a", reason="r")
    assert store.publish("m", *kit.linear_artifact(seed=9))["version"] == 4
    assert [v["version"] for v in store.list_versions("m")] == [1, 2, 4]
    assert store.get_model("m")["newest_version"] == 4


def test_delete_drops_the_cached_model(store, kit):
    store.publish("m", *kit.linear_artifact())
    store.load("m", 1)
    assert store.cache_stats()["items"] == 1
    store.delete_version("m", 1)
    assert store.cache_stats()["items"] == 0
    with pytest.raises(NotFound):
        store.load("m", 1)


def test_prune_keeps_the_live_version_and_the_newest_n(store, kit):
    for seed in range(6):
        store.publish("m", *kit.linear_artifact(seed=seed))
    store.set_live("m", 2, actor="a", reason="r")
    assert store.prune("m", 2) == [1, 3, 4]
    assert [v["version"] for v in store.list_versions("m")] == [2, 5, 6]
    assert sorted(p.name for p in (store.root / "m").iterdir()) == ["2", "5", "6"]
    assert store.prune("m", 2) == []
    assert store.prune("m", 0) == [5, 6]
    assert [v["version"] for v in store.list_versions("m")] == [2]
    for bad in (-1, 1.5, "2", True):
        with pytest.raises(InvalidSpec, match="keep"):
            store.prune("m", bad)


def test_prune_without_live_version_keeps_newest(store, kit):
    for seed in range(4):
        store.publish("m", *kit.linear_artifact(seed=seed))
    assert store.prune("m", 1) == [1, 2, 3]
    assert store.publish("m", *kit.linear_artifact(seed=7))["version"] == 5


def test_cache_is_bounded_by_count(tmp_path, catalog_url, kit):
    settings = Settings(store=tmp_path / "s", database_url=catalog_url, cache_models=2)
    with Store(settings, model_loader=kit.linear_loader) as s:
        for seed in range(3):
            s.publish("m", *kit.linear_artifact(seed=seed))
        first = s.load("m", 1)
        s.load("m", 2)
        assert s.load("m", 1) is first  # hit, and now most recent
        s.load("m", 3)  # evicts 2, the least recently used
        stats = s.cache_stats()
        assert stats["items"] == 2 and stats["evictions"] == 1 and stats["hits"] == 1
        assert s.load("m", 1) is first
        assert s.cache_stats()["misses"] == 3


def test_cache_is_bounded_by_bytes(tmp_path, catalog_url, kit):
    settings = Settings(store=tmp_path / "s", database_url=catalog_url, cache_bytes=30_000)
    with Store(settings, model_loader=kit.linear_loader) as s:
        s.publish("big", *kit.linear_artifact(5_000))  # 2 x 40 kB of arrays: never cached
        s.publish("small", *kit.linear_artifact(1_000))  # 16 kB: cached
        s.publish("small", *kit.linear_artifact(1_000, seed=1))
        s.load("big", 1)
        assert s.cache_stats()["items"] == 0
        a = s.load("small", 1)
        assert s.load("small", 1) is a
        s.load("small", 2)  # 2 x 16 kB > 30 kB: version 1 goes
        stats = s.cache_stats()
        assert stats["items"] == 1 and stats["bytes"] <= 30_000
        assert s.load("small", 1) is not a


def test_new_live_version_is_seen_by_another_process_without_restart(store, kit, tmp_path):
    for seed in range(2):
        store.publish("m", *kit.linear_artifact(seed=seed))
    store.set_live("m", 1, actor="a", reason="r")
    other = Store(store.settings, model_loader=kit.linear_loader, catalog_ttl_s=0.2)
    assert other.live_version("m") == 1
    store.set_live("m", 2, actor="a", reason="r")
    assert store.live_version("m") == 2  # the writer sees it at once
    deadline = time.monotonic() + 10
    while other.live_version("m") != 2:  # the other sees it once its short catalog cache expires
        assert time.monotonic() < deadline, "the other store never saw the new live version"
        time.sleep(0.05)
    other.close()


def test_sweep_leaves_nothing_behind_after_clean_use(store, kit):
    store.publish("m", *kit.linear_artifact())
    assert list((store.root / ".staging").iterdir()) == []
    assert list((store.root / ".trash").iterdir()) == []


def test_ping(store):
    assert store.ping() == {"catalog": "ok", "store": "ok", "versions": "ok"}


def test_disk_full_while_publishing_leaves_nothing(store, kit, monkeypatch):
    import errno

    from service.errors import StorageFailure
    from service.store import artifact

    store.publish("m", *kit.linear_artifact(seed=1))

    def full(folder, data):  # the manifest write hits a full disk (ENOSPC), after the number was taken
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(artifact, "write_manifest", full)
    with pytest.raises(StorageFailure, match="No space left on device.*nothing was published"):
        store.publish("m", *kit.linear_artifact(seed=2))
    monkeypatch.undo()
    assert [v["version"] for v in store.list_versions("m")] == [1]
    assert list((store.root / ".staging").iterdir()) == []
    assert store.publish("m", *kit.linear_artifact(seed=3))["version"] == 2


def test_a_file_in_the_way_of_a_model_folder(store, kit):
    from service.errors import StorageFailure

    (store.root / "m").write_text("not a folder")
    with pytest.raises(StorageFailure, match="is not a folder"):
        store.publish("m", *kit.linear_artifact())
    assert store.list_models() == []


@pytest.mark.parametrize("version", [2**31, 2**63, 10**20])
def test_versions_beyond_the_catalog_integer_range_are_not_found(store, kit, version):
    """PostgreSQL's INTEGER is 32-bit, SQLite's 64-bit (their manuals, from memory): a number beyond either
    is "no such version" on both backends, never a driver overflow turned into a storage failure."""
    store.publish("m", *kit.linear_artifact(seed=1))
    for call in (store.get_version, store.get_manifest, store.load, store.delete_version):
        with pytest.raises(NotFound, match="version numbers go up to 2147483647"):
            call("m", version)
    with pytest.raises(NotFound):
        store.set_live("m", version, actor="test", reason="overflow probe")
