"""Aggregated monitoring counts: input drift bins and outcome error sums per model version, hour bucket
and server process (``monitor_sums``; see ``service.store.monitor``).

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "monitor_sums",
        sa.Column("model", sa.String(63), primary_key=True),
        sa.Column("version", sa.Integer, primary_key=True),
        sa.Column("bucket", sa.BigInteger, primary_key=True),
        sa.Column("kind", sa.String(16), primary_key=True),
        sa.Column("replica", sa.String(32), primary_key=True),
        sa.Column("counts", sa.JSON(none_as_null=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
    )
    op.create_index("ix_monitor_sums_lookup", "monitor_sums", ["model", "version", "kind", "bucket"])


def downgrade() -> None:
    op.drop_index("ix_monitor_sums_lookup", table_name="monitor_sums")
    op.drop_table("monitor_sums")
