"""Fixtures of the store tests: a real SQLite catalog in a temporary folder and, when
TIKHON_TEST_POSTGRES_URL points at a reachable server, a real PostgreSQL catalog in a fresh schema per
test (dropped afterwards). No database is mocked.

Locally the PostgreSQL cases skip with the reason shown by ``-ra``; under ``.ci/run``
(TIKHON_CI_FULL=1) an unreachable server is a failure, not a skip.
"""

from __future__ import annotations

import importlib.util
import os
import subprocess
import sys
import uuid
from pathlib import Path
from types import SimpleNamespace
from urllib.parse import quote

import numpy as np
import pytest
import sqlalchemy as sa

from service.settings import Settings
from service.store import Store
from service.store.catalog import normalize_url, safe_url

REPO = Path(__file__).resolve().parents[2]
PROCS = Path(__file__).resolve().parent / "procs.py"
PG_ENV = "TIKHON_TEST_POSTGRES_URL"


def _load_procs():
    spec = importlib.util.spec_from_file_location("tikhon_store_procs", PROCS)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


procs = _load_procs()
linear_loader = procs.linear_loader


def _skip_or_fail(reason: str):
    if os.environ.get("TIKHON_CI_FULL"):
        pytest.fail(f"{reason} (TIKHON_CI_FULL is set, so PostgreSQL tests must run)")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def pg_admin():
    url = os.environ.get(PG_ENV)
    if not url:
        _skip_or_fail(f"{PG_ENV} is not set; PostgreSQL store tests need a server (.ci/run starts one)")
    engine = sa.create_engine(normalize_url(url), connect_args={"connect_timeout": 5}, isolation_level="AUTOCOMMIT")
    try:
        with engine.connect() as conn:
            conn.execute(sa.text("SELECT 1"))
    except sa.exc.SQLAlchemyError as exc:
        _skip_or_fail(f"PostgreSQL at {safe_url(engine)} is unreachable: {str(exc.orig or exc).splitlines()[0]}")
    yield engine
    engine.dispose()


@pytest.fixture
def pg_url(pg_admin):
    """A PostgreSQL URL whose search_path is a fresh schema (so tests never see each other's tables)."""
    schema = f"t_{uuid.uuid4().hex[:16]}"
    with pg_admin.connect() as conn:
        conn.execute(sa.text(f'CREATE SCHEMA "{schema}"'))
    base = normalize_url(os.environ[PG_ENV])
    sep = "&" if "?" in base else "?"
    yield f"{base}{sep}options={quote('-csearch_path=' + schema)}"
    with pg_admin.connect() as conn:
        conn.execute(sa.text(f'DROP SCHEMA "{schema}" CASCADE'))


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def backend(request) -> str:
    return request.param


@pytest.fixture
def catalog_url(backend, request) -> str | None:
    """None means the default SQLite catalog at <store>/catalog.db."""
    if backend == "sqlite":
        return None
    return request.getfixturevalue("pg_url")


@pytest.fixture
def settings(tmp_path, catalog_url) -> Settings:
    return Settings(store=tmp_path / "store", database_url=catalog_url)


@pytest.fixture
def store(settings):
    s = Store(settings, model_loader=linear_loader)
    yield s
    s.close()


def run_proc(*args: str, timeout: float = 120, check: bool = True) -> subprocess.CompletedProcess:
    """Run tests/store/procs.py in a fresh interpreter."""
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    res = subprocess.run([sys.executable, str(PROCS), *args], capture_output=True, text=True, timeout=timeout,
                         env=env)
    if check and res.returncode != 0:
        raise AssertionError(f"procs.py {' '.join(args)} failed ({res.returncode}):\n{res.stdout}\n{res.stderr}")
    return res


def proc_env() -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}


@pytest.fixture
def kit():
    """Helpers shared by the store tests (test modules cannot import each other in importlib mode)."""
    return SimpleNamespace(procs=procs, run_proc=run_proc, proc_env=proc_env, PROCS=PROCS,
                           linear_artifact=procs.linear_artifact, linear_loader=procs.linear_loader)
