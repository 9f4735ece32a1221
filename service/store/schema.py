"""Catalog tables (SQLAlchemy Core). The migrations in ``migrations/versions`` create exactly these;
``tests/store/test_migrations.py`` checks that the migrated schema and this module agree."""

from __future__ import annotations

from sqlalchemy import (
    JSON,
    BigInteger,
    Column,
    DateTime,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Table,
    Text,
    UniqueConstraint,
)

metadata = MetaData()

TS = DateTime(timezone=True)
JSONV = JSON(none_as_null=True)

# One row per model name. ``last_version`` is the counter versions are allocated from; it only grows,
# so a deleted version's number is never handed out again.
models = Table(
    "models",
    metadata,
    Column("name", String(63), primary_key=True),
    Column("created_at", TS, nullable=False),
    Column("updated_at", TS, nullable=False),
    Column("last_version", Integer, nullable=False),
    Column("live_version", Integer, nullable=True),
)

# Version numbers are INTEGER columns: 32-bit signed on PostgreSQL (64-bit on SQLite). Every catalog
# answers for this range only, so a caller's number beyond it is "no such version", never an overflow.
VERSION_MAX = 2**31 - 1

# One row per published version. A deleted version keeps its row (``deleted_at`` set) so its number
# stays taken and the history that mentions it stays readable.
versions = Table(
    "versions",
    metadata,
    Column("model_name", String(63), ForeignKey("models.name"), primary_key=True),
    Column("version", Integer, primary_key=True),
    Column("created_at", TS, nullable=False),
    Column("job_id", String(64), nullable=True),
    Column("manifest_sha256", String(64), nullable=False),
    Column("arrays_sha256", String(64), nullable=False),
    Column("bytes", BigInteger, nullable=False),
    Column("summary", JSONV, nullable=True),
    Column("deleted_at", TS, nullable=True),
)

# Append-only (triggers refuse UPDATE and DELETE): every change of a model's live version.
history = Table(
    "history",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    Column("model_name", String(63), nullable=False),
    Column("at", TS, nullable=False),
    Column("actor", String(200), nullable=False),
    Column("from_version", Integer, nullable=True),
    Column("to_version", Integer, nullable=True),
    Column("reason", Text, nullable=False),
    Column("details", JSONV, nullable=True),
    Index("ix_history_model", "model_name", "id"),
)

jobs = Table(
    "jobs",
    metadata,
    Column("id", String(32), primary_key=True),
    Column("model_name", String(63), nullable=False),
    Column("state", String(16), nullable=False),
    Column("request", JSONV, nullable=False),
    Column("request_sha256", String(64), nullable=False),
    Column("data_path", Text, nullable=True),
    Column("idempotency_key", String(255), nullable=True),
    Column("attempts", Integer, nullable=False),
    Column("worker_id", String(200), nullable=True),
    Column("progress_done", Integer, nullable=False),
    Column("progress_total", Integer, nullable=True),
    Column("created_at", TS, nullable=False),
    Column("started_at", TS, nullable=True),
    Column("heartbeat_at", TS, nullable=True),
    Column("finished_at", TS, nullable=True),
    Column("version", Integer, nullable=True),
    Column("problem", JSONV, nullable=True),
    Column("decision", JSONV, nullable=True),
    # {"version": <the model's live version when the job was submitted, or null>}; NULL on older jobs.
    Column("live_at_submit", JSONV, nullable=True),
    UniqueConstraint("model_name", "idempotency_key", name="uq_jobs_idempotency"),
    Index("ix_jobs_state_created", "state", "created_at"),
    Index("ix_jobs_model_created", "model_name", "created_at"),
)

api_keys = Table(
    "api_keys",
    metadata,
    Column("key_id", String(32), primary_key=True),
    Column("secret_sha256", String(64), nullable=False),
    Column("scopes", JSONV, nullable=False),
    Column("label", String(200), nullable=False),
    Column("created_at", TS, nullable=False),
    Column("revoked_at", TS, nullable=True),
)

# Key/value facts about the catalog itself; ``catalog_id`` (a random hex id written by migration 0002)
# names this catalog, so the store can tell it from another one (see ``Store.catalog_id``).
catalog_info = Table(
    "catalog_info",
    metadata,
    Column("key", String(64), primary_key=True),
    Column("value", String(200), nullable=False),
)

# Aggregated monitoring counts (never raw request rows): one row per model version, hour bucket, kind
# ("inputs": drift bins of served inputs; "outcomes": error sums of scored outcomes) and replica (one
# server process). A replica rewrites only its own rows with its cumulative counts, so replicas add up
# on read and a replica's flush is idempotent (see ``service.store.monitor``).
monitor_sums = Table(
    "monitor_sums",
    metadata,
    Column("model", String(63), primary_key=True),
    Column("version", Integer, primary_key=True),
    Column("bucket", BigInteger, primary_key=True),  # start of the hour, seconds since the Unix epoch (UTC)
    Column("kind", String(16), primary_key=True),
    Column("replica", String(32), primary_key=True),
    Column("counts", JSONV, nullable=False),
    Column("updated_at", TS, nullable=False),
    Index("ix_monitor_sums_lookup", "model", "version", "kind", "bucket"),
)
