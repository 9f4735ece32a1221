"""Fixtures of the contract tests: one live server (tests/livesvc.py) toured once per session."""

from __future__ import annotations

import httpx
import pytest

import livesvc  # tests/livesvc.py (tests/ is on pytest's pythonpath)


@pytest.fixture(scope="session")
def toured(tmp_path_factory):
    """(base URL, the document while the server was open, the document once keys existed, the tour's answers,
    the tour's admin key)."""
    from apitour import Tour  # tests/apitour.py

    with livesvc.live_service(tmp_path_factory.mktemp("contract"), worker=True) as (base, store, _):
        open_doc = httpx.get(f"{base}/openapi.json", timeout=60).json()
        tour = Tour(base)
        answers = tour.run()
        keyed_doc = httpx.get(f"{base}/openapi.json", timeout=60).json()
        yield base, open_doc, keyed_doc, answers, tour.http.headers["Authorization"].removeprefix("Bearer ")
