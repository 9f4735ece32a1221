"""Catalog migrations, one file per revision (applied in order by Alembic)."""
