"""Alembic environment of the Tikhon catalog.

The store runs migrations programmatically (``service.store.catalog.migrate``) on a connection it has
already opened inside a locked transaction, passed in ``config.attributes["connection"]``. The offline
branch (``alembic upgrade --sql``) renders SQL for a URL given as ``sqlalchemy.url``.
"""

from __future__ import annotations

from alembic import context

from service.store.schema import metadata

VERSION_TABLE = "tikhon_schema_version"

config = context.config

if context.is_offline_mode():
    context.configure(
        url=config.get_main_option("sqlalchemy.url"),
        target_metadata=metadata,
        literal_binds=True,
        version_table=VERSION_TABLE,
    )
    with context.begin_transaction():
        context.run_migrations()
else:
    connection = config.attributes.get("connection")
    if connection is None:
        raise SystemExit("the Tikhon catalog migrates itself when the store opens; run `tikhon serve` or "
                         "open service.store.Store, or use --sql with sqlalchemy.url set")
    context.configure(connection=connection, target_metadata=metadata, version_table=VERSION_TABLE)
    with context.begin_transaction():
        context.run_migrations()
