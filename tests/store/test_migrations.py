"""The catalog schema comes from versioned Alembic migrations, and they match the tables the code uses."""

from __future__ import annotations

import pytest
import sqlalchemy as sa
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext

from service.errors import Conflict, StorageFailure
from service.store import Store
from service.store.catalog import SCHEMA_HEAD, VERSION_TABLE, alembic_config, head_revision, write_txn
from service.store.schema import metadata


def test_schema_head_constant_is_alembics_head():
    assert SCHEMA_HEAD == head_revision()


def test_migrated_schema_matches_the_code(store):
    with store.db.sql.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"version_table": VERSION_TABLE, "compare_type": True})
        diff = compare_metadata(ctx, metadata)
    assert diff == []
    with store.db.sql.connect() as conn:
        assert conn.execute(sa.text(f"SELECT version_num FROM {VERSION_TABLE}")).scalar() == head_revision()


def test_downgrade_to_nothing_and_back(store, kit):
    store.publish("m", *kit.linear_artifact())
    engine = store.db.sql
    with write_txn(engine) as conn:
        cfg = alembic_config()
        cfg.attributes["connection"] = conn
        command.downgrade(cfg, "base")
    assert set(sa.inspect(engine).get_table_names()) <= {VERSION_TABLE}
    store.close()
    reopened = Store(store.settings, model_loader=kit.linear_loader)  # migrates again at open
    assert reopened.list_models() == []
    # The version folder from before has no catalog row now: it is kept and reported, never swept away,
    # and publishing over its number is refused until `tikhon store recover` registers it.
    assert (reopened.root / "m" / "1" / "manifest.json").is_file()
    assert reopened.unlisted == [("m", 1)]
    with pytest.raises(Conflict, match="m/1 exists but the catalog has no row"):
        reopened.publish("m", *kit.linear_artifact())
    assert reopened.recover()["registered"] == [{"name": "m", "version": 1}]
    assert reopened.publish("m", *kit.linear_artifact())["version"] == 2
    reopened.close()


def test_a_catalog_from_a_newer_release_is_refused(store):
    with store.db.sql.begin() as conn:
        conn.execute(sa.text(f"UPDATE {VERSION_TABLE} SET version_num = '9999'"))
    store.close()
    with pytest.raises(StorageFailure, match="schema revision '9999'.*upgrade this one"):
        Store(store.settings)


def test_unsupported_database_urls(tmp_path):
    from service.settings import Settings

    for url, match in [("mysql://u@h/db", "SQLite or PostgreSQL"), ("sqlite://", "in-memory"),
                       ("postgresql+psycopg2://u@h/db", "psycopg 3"), ("not a url", "not a valid")]:
        with pytest.raises(StorageFailure, match=match):
            Store(Settings(store=tmp_path / "s", database_url=url))
