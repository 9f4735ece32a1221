"""Alembic environment and versioned migrations of the catalog."""
