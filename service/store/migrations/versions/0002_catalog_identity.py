"""Catalog identity (one row naming this catalog with a random id), and the live version a training
job saw when it was submitted.

The id lets the store prove that a version folder left half-published (a ``.publishing`` marker inside
it, see ``service.store.store``) was begun against *this* catalog, and lets a running server notice that
its catalog was replaced under it. A catalog created before this revision gets its id here.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02
"""

from __future__ import annotations

import uuid

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    table = op.create_table(
        "catalog_info",
        sa.Column("key", sa.String(64), primary_key=True),
        sa.Column("value", sa.String(200), nullable=False),
    )
    op.bulk_insert(table, [{"key": "catalog_id", "value": uuid.uuid4().hex}])
    # {"version": <live version or null>} at submission; NULL for jobs submitted before this revision.
    with op.batch_alter_table("jobs") as batch:
        batch.add_column(sa.Column("live_at_submit", sa.JSON(none_as_null=True), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("jobs") as batch:
        batch.drop_column("live_at_submit")
    op.drop_table("catalog_info")
