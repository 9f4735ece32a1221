"""Shared by the top-level tests (client, CLI, README): a real Tikhon server on a free loopback port.

``live_service(root, worker=True, **settings)`` builds the app, store and (optionally) the embedded
worker exactly as ``tikhon serve`` does (``service.api.server.build``), serves it with uvicorn in a
background thread and yields ``(base_url, store, settings)``. Folder-level conftest files
(``tests/api``, ``tests/store``) keep their own fixtures; the names here do not overlap with theirs.
"""

from __future__ import annotations

import contextlib
import socket
import threading
import time

import pytest


@contextlib.contextmanager
def _serve(app):
    import uvicorn

    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(app, log_level="warning", access_log=False, lifespan="on",
                                           timeout_graceful_shutdown=5))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 60  # a start-up wait, not a timed assertion
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            raise RuntimeError("uvicorn did not start")
        time.sleep(0.01)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)
        sock.close()


@contextlib.contextmanager
def _live_service(root, *, worker: bool = True, **over):
    from service.api.server import build
    from service.settings import Settings

    base = dict(store=root / "store", data_dir=root / "data", worker_heartbeat_s=0.2, worker_poll_s=0.05,
                worker_stale_s=30.0, cancel_grace_s=5.0, auth_cache_s=0.0, live_cache_s=0.0, log_level="warning")
    base.update(over)
    (root / "data").mkdir(parents=True, exist_ok=True)
    settings = Settings(**base)
    app, store, w = build(settings, embedded_worker=worker)
    if w is not None:
        w.start()
    try:
        with _serve(app) as url:
            yield url, store, settings
    finally:
        if w is not None:
            w.stop()
        store.close()


@pytest.fixture(scope="session")
def live_service():
    """The ``_live_service(root, worker=..., **settings)`` context manager, as a fixture."""
    return _live_service


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
