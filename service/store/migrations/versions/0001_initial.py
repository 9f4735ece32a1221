"""Initial catalog: models, versions, history (append-only), jobs, API keys.

Revision ID: 0001
Revises:
Create Date: 2026-05-09
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None

TS = sa.DateTime(timezone=True)
JSONV = sa.JSON(none_as_null=True)


def upgrade() -> None:
    op.create_table(
        "models",
        sa.Column("name", sa.String(63), primary_key=True),
        sa.Column("created_at", TS, nullable=False),
        sa.Column("updated_at", TS, nullable=False),
        sa.Column("last_version", sa.Integer, nullable=False),
        sa.Column("live_version", sa.Integer, nullable=True),
    )
    op.create_table(
        "versions",
        sa.Column("model_name", sa.String(63), sa.ForeignKey("models.name"), primary_key=True),
        sa.Column("version", sa.Integer, primary_key=True),
        sa.Column("created_at", TS, nullable=False),
        sa.Column("job_id", sa.String(64), nullable=True),
        sa.Column("manifest_sha256", sa.String(64), nullable=False),
        sa.Column("arrays_sha256", sa.String(64), nullable=False),
        sa.Column("bytes", sa.BigInteger, nullable=False),
        sa.Column("summary", JSONV, nullable=True),
        sa.Column("deleted_at", TS, nullable=True),
    )
    op.create_table(
        "history",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("model_name", sa.String(63), nullable=False),
        sa.Column("at", TS, nullable=False),
        sa.Column("actor", sa.String(200), nullable=False),
        sa.Column("from_version", sa.Integer, nullable=True),
        sa.Column("to_version", sa.Integer, nullable=True),
        sa.Column("reason", sa.Text, nullable=False),
        sa.Column("details", JSONV, nullable=True),
    )
    op.create_index("ix_history_model", "history", ["model_name", "id"])
    op.create_table(
        "jobs",
        sa.Column("id", sa.String(32), primary_key=True),
        sa.Column("model_name", sa.String(63), nullable=False),
        sa.Column("state", sa.String(16), nullable=False),
        sa.Column("request", JSONV, nullable=False),
        sa.Column("request_sha256", sa.String(64), nullable=False),
        sa.Column("data_path", sa.Text, nullable=True),
        sa.Column("idempotency_key", sa.String(255), nullable=True),
        sa.Column("attempts", sa.Integer, nullable=False),
        sa.Column("worker_id", sa.String(200), nullable=True),
        sa.Column("progress_done", sa.Integer, nullable=False),
        sa.Column("progress_total", sa.Integer, nullable=True),
        sa.Column("created_at", TS, nullable=False),
        sa.Column("started_at", TS, nullable=True),
        sa.Column("heartbeat_at", TS, nullable=True),
        sa.Column("finished_at", TS, nullable=True),
        sa.Column("version", sa.Integer, nullable=True),
        sa.Column("problem", JSONV, nullable=True),
        sa.Column("decision", JSONV, nullable=True),
        sa.UniqueConstraint("model_name", "idempotency_key", name="uq_jobs_idempotency"),
    )
    op.create_index("ix_jobs_state_created", "jobs", ["state", "created_at"])
    op.create_index("ix_jobs_model_created", "jobs", ["model_name", "created_at"])
    op.create_table(
        "api_keys",
        sa.Column("key_id", sa.String(32), primary_key=True),
        sa.Column("secret_sha256", sa.String(64), nullable=False),
        sa.Column("scopes", JSONV, nullable=False),
        sa.Column("label", sa.String(200), nullable=False),
        sa.Column("created_at", TS, nullable=False),
        sa.Column("revoked_at", TS, nullable=True),
    )

    # history is append-only: the database itself refuses to change or remove a row.
    dialect = op.get_bind().dialect.name
    if dialect == "sqlite":
        for event in ("UPDATE", "DELETE"):
            op.execute(
                f"CREATE TRIGGER history_append_only_{event.lower()} BEFORE {event} ON history "
                "BEGIN SELECT RAISE(ABORT, 'history is append-only'); END"
            )
    elif dialect == "postgresql":
        op.execute(
            "CREATE FUNCTION tikhon_history_append_only() RETURNS trigger LANGUAGE plpgsql AS "
            "$$ BEGIN RAISE EXCEPTION 'history is append-only'; END $$"
        )
        op.execute(
            "CREATE TRIGGER history_append_only BEFORE UPDATE OR DELETE ON history "
            "FOR EACH ROW EXECUTE FUNCTION tikhon_history_append_only()"
        )


def downgrade() -> None:
    dialect = op.get_bind().dialect.name
    if dialect == "sqlite":
        op.execute("DROP TRIGGER IF EXISTS history_append_only_update")
        op.execute("DROP TRIGGER IF EXISTS history_append_only_delete")
    elif dialect == "postgresql":
        op.execute("DROP TRIGGER IF EXISTS history_append_only ON history")
        op.execute("DROP FUNCTION IF EXISTS tikhon_history_append_only()")
    op.drop_table("api_keys")
    op.drop_index("ix_jobs_model_created", table_name="jobs")
    op.drop_index("ix_jobs_state_created", table_name="jobs")
    op.drop_table("jobs")
    op.drop_index("ix_history_model", table_name="history")
    op.drop_table("history")
    op.drop_table("versions")
    op.drop_table("models")
