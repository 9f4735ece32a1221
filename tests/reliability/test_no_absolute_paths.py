"""Problem details never reveal where the server keeps its files (issue 11, item 7).

Requests that fail on a file of the data folder or of the store must name the file relative to
``TIKHON_DATA_DIR`` / ``TIKHON_STORE``; the absolute paths of those folders (resolved or as configured)
must not appear anywhere in the answer. Common practice (OWASP: error messages should not disclose
file-system paths), checked here against a real server process.
"""

from __future__ import annotations

import os
from pathlib import Path

import httpx
import pytest


def _leaks(text: str, settings: dict) -> list[str]:
    found = []
    for key in ("data_dir", "store"):
        for form in {settings[key], os.path.abspath(settings[key]), os.path.realpath(settings[key])}:
            if form in text:
                found.append(form)
    return found


@pytest.fixture(scope="module")
def server(tmp_path_factory, rk):
    root = tmp_path_factory.mktemp("paths")
    settings = rk.base_settings(root, embedded_worker=False)
    store = rk.open_store(settings)
    rk.publish_demo(store, "pumps", n=200, seed=31)
    rk.publish_demo(store, "damaged", n=120, seed=32)
    store.close()
    data = Path(settings["data_dir"])
    (data / "june").mkdir(exist_ok=True)
    (data / "june" / "broken.parquet").write_bytes(b"PAR1 this is not a Parquet file")
    with rk.server_process(root, **settings) as srv:
        yield srv, settings


def test_data_folder_paths_are_relative(server, rk):
    srv, settings = server
    with httpx.Client(base_url=srv.base, timeout=60) as c:
        for source in ("june/missing.csv", "june/broken.parquet", "/etc/passwd", "../outside.csv", "june"):
            r = c.post("/v1/models/pumps/trainings", json={"data": {"source": source}, "spec": {"target": "energy_kwh"}})
            p = rk.assert_problem(r, 422)
            assert not _leaks(r.text, settings), (source, p["detail"])
            assert "TIKHON_DATA_DIR" in p["detail"] or "broken.parquet" in p["detail"], p["detail"]
        r = c.post("/v1/models/pumps/trainings",
                   json={"data": {"source": "june/broken.parquet"}, "spec": {"target": "energy_kwh"}})
        # the reader opens the file itself (so pyarrow never sees its path) and names the source as the caller did
        detail = r.json()["detail"]
        assert "'june/broken.parquet'" in detail and not _leaks(r.text, settings), detail


def test_store_paths_are_relative(server, rk):
    srv, settings = server
    folder = Path(settings["store"]) / "damaged" / "1"
    arrays = folder / "arrays.npz"  # (cv.npz, the CV table, is read only by /cv)
    arrays.write_bytes(arrays.read_bytes()[:-7] + b"garbage")  # same folder, wrong bytes: fails its checksum
    with httpx.Client(base_url=srv.base, timeout=60) as c:
        r = c.post("/v1/models/damaged/versions/1/predictions", json={"rows": [{"flow_lps": 50.0, "head_m": 30.0}]})
        p = rk.assert_problem(r, 500, 507)
        assert p["type"] == "/problems/integrity-failure", p
        assert not _leaks(r.text, settings), p["detail"]
        assert "folder damaged/1 of the store" in p["detail"], p["detail"]
        # the page shows the same refusal as HTML, with the same relative path
        page = c.get("/models/damaged", params={"version": "1"})
        assert not _leaks(page.text, settings)


def test_recorded_job_problems_and_readiness_are_redacted(tmp_path):
    """A problem a worker recorded with a full path (from a library's message), and the readiness answer,
    pass through the same redaction at the HTTP boundary."""
    from service import paths
    from service import problems
    from service.settings import Settings

    settings = Settings(store=tmp_path / "st", data_dir=tmp_path / "dt")
    paths.register(settings)
    store_abs, data_abs = os.path.abspath(tmp_path / "st"), os.path.abspath(tmp_path / "dt")
    recorded = {"type": "invalid-data", "title": "Invalid data", "status": 422,
                "detail": f"Could not open Parquet input source '{data_abs}/may/x.parquet': magic bytes",
                "errors": [{"field": "data.source", "value": f"{store_abs}/_jobs/1/data.parquet"}]}
    out = problems.stored_problem(recorded)
    assert out["detail"] == "Could not open Parquet input source '<TIKHON_DATA_DIR>/may/x.parquet': magic bytes"
    assert out["errors"][0]["value"] == "<TIKHON_STORE>/_jobs/1/data.parquet"
    body = problems.problem_body(slug="not-ready", title="Not ready", status=503,
                                 detail=f"the store folder {store_abs} is not writable (Read-only file system).",
                                 checks={"failure": f"the store folder {store_abs} is not writable"})
    assert body["detail"] == "the store folder <TIKHON_STORE> is not writable (Read-only file system)."
    assert body["checks"] == {"failure": "the store folder <TIKHON_STORE> is not writable"}
    # a sibling folder whose name starts like the store is a different folder: left as it is
    assert paths.redact(f"{store_abs}2/x") == f"{store_abs}2/x"
    assert paths.shown(f"{data_abs}/june/a.csv", data_abs) == "june/a.csv"
    assert paths.shown("/elsewhere/b.csv", data_abs) == "b.csv"
