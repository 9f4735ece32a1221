"""Shared by the top-level tests (client, CLI, README): a real Tikhon server on a free loopback port.

``live_service(root, worker=True, **settings)`` (from ``tests/livesvc.py``) builds the app, store and
(optionally) the embedded worker exactly as ``tikhon serve`` does, serves it with uvicorn in a
background thread and yields ``(base_url, store, settings)``. Folder-level conftest files
(``tests/api``, ``tests/store``) keep their own fixtures; the names here do not overlap with theirs.
"""

from __future__ import annotations

import pytest

import livesvc  # tests/livesvc.py (tests/ is on pytest's pythonpath)


@pytest.fixture(scope="session")
def live_service():
    """The ``livesvc.live_service(root, worker=..., **settings)`` context manager, as a fixture."""
    return livesvc.live_service


@pytest.fixture
def postgres_catalog_url():
    """A PostgreSQL catalog URL whose search_path is a fresh schema, dropped afterwards.

    Reads TIKHON_TEST_POSTGRES_URL. Locally the test skips with the reason when it is unset or the
    server is unreachable; under .ci/run (TIKHON_CI_FULL=1) that is a failure."""
    import os
    import uuid
    from urllib.parse import quote

    import sqlalchemy as sa

    from service.store.catalog import normalize_url

    def skip_or_fail(reason: str):
        if os.environ.get("TIKHON_CI_FULL"):
            pytest.fail(f"{reason} (TIKHON_CI_FULL is set, so PostgreSQL tests must run)")
        pytest.skip(reason)

    url = os.environ.get("TIKHON_TEST_POSTGRES_URL")
    if not url:
        skip_or_fail("TIKHON_TEST_POSTGRES_URL is not set; this test needs a PostgreSQL server (.ci/run starts one)")
    admin = sa.create_engine(normalize_url(url), connect_args={"connect_timeout": 5}, isolation_level="AUTOCOMMIT")
    schema = f"t_{uuid.uuid4().hex[:16]}"
    try:
        with admin.connect() as conn:
            conn.execute(sa.text(f'CREATE SCHEMA "{schema}"'))
    except sa.exc.SQLAlchemyError as exc:
        admin.dispose()
        skip_or_fail(f"PostgreSQL is unreachable: {str(exc.orig or exc).splitlines()[0]}")
    base = normalize_url(url)
    sep = "&" if "?" in base else "?"
    try:
        yield f"{base}{sep}options={quote('-csearch_path=' + schema)}"
    finally:
        with admin.connect() as conn:
            conn.execute(sa.text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()
