"""Caller input that used to end in a 500 (issue 11, items 9, 10 and 11), against a real server process.

* A version number beyond the catalog's integer range answers 404 or 422, never 500 (the catalog's
  version column is a 32-bit INTEGER on PostgreSQL, 64-bit on SQLite; Python's ``int()`` also refuses
  strings of more than 4300 digits: common practice to check digits and length before converting).
* A training submission on a store folder that became read-only answers 507 like a full disk (the
  clean-up of the staged file used to raise inside its own error handler: EROFS refuses even an unlink).
* A ``source`` whose file name is too long (ENAMETOOLONG, a component over NAME_MAX = 255 bytes on Linux
  file systems, from memory) or a symbolic link loop inside the data folder (ELOOP) answers 422 naming the
  path relative to the data folder, never 500, and never the folder's absolute path.
"""

from __future__ import annotations

import contextlib
import json
import os
import subprocess
from pathlib import Path

import httpx
import pytest

HUGE = ("99999999999999999999", str(2**63), str(2**31), "9" * 5000)


@pytest.fixture(scope="module")
def server(tmp_path_factory, rk):
    root = tmp_path_factory.mktemp("inputs")
    settings = rk.base_settings(root, embedded_worker=False)
    store = rk.open_store(settings)
    rk.publish_demo(store, "pumps", n=200, seed=21)
    store.close()
    with rk.server_process(root, **settings) as srv:
        yield srv, settings


def test_versions_beyond_the_catalog_range_are_not_found_or_invalid(server, rk):
    srv, _ = server
    row = {"rows": [{"flow_lps": 50.0, "head_m": 30.0}]}
    with httpx.Client(base_url=srv.base, timeout=60) as c:
        assert c.get("/v1/models/pumps/versions/1").status_code == 200  # the model is there
        for v in HUGE:
            for method, path, body in (("GET", f"/v1/models/pumps/versions/{v}", None),
                                       ("GET", f"/v1/models/pumps/versions/{v}/cv", None),
                                       ("GET", f"/v1/models/pumps/versions/{v}/path", None),
                                       ("GET", f"/v1/models/pumps/versions/{v}/plots/cv", None),
                                       ("GET", f"/v1/models/pumps/versions/{v}/plots/path", None),
                                       ("GET", f"/v1/models/pumps/versions/{v}/plots/residuals", None),
                                       ("POST", f"/v1/models/pumps/versions/{v}/predictions", row),
                                       ("DELETE", f"/v1/models/pumps/versions/{v}", None)):
                p = rk.assert_problem(c.request(method, path, json=body), 404, 422)
                assert "version" in p["detail"], (method, path, p)
            # In a JSON body, a number beyond 64 bits is refused by the JSON reader itself (orjson reads
            # integers up to 2**64 - 1) as a malformed body; within 64 bits it is the version's own 404/422.
            body = ('{"version": %s, "reason": "overflow probe"}' % v).encode()
            r = c.put("/v1/models/pumps/live", content=body, headers={"content-type": "application/json"})
            if int(v[:30]) < 2**64:
                assert "version" in rk.assert_problem(r, 404, 422)["detail"]
            else:
                rk.assert_problem(r, 400, 404, 422)
            page = c.get("/models/pumps", params={"version": v})
            assert page.status_code == 404 and page.headers["content-type"].startswith("text/html"), page.status_code
        # the server still answers, and the live version did not move
        assert c.get("/v1/models/pumps").json()["live_version"] == 1
        assert c.post("/v1/models/pumps/versions/1/predictions", json=row).status_code == 200


def test_store_refuses_versions_beyond_the_catalog_range_as_not_found(tmp_path, rk):
    """The same guard in the store itself, for every caller (CLI, worker, pages): NotFound, not OverflowError."""
    from service.errors import NotFound

    settings = rk.base_settings(tmp_path)
    store = rk.open_store(settings)
    try:
        rk.publish_demo(store, "pumps", n=120, seed=22)
        for v in (2**31, 2**63, 10**20):
            for call in (store.get_version, store.get_manifest, store.load, store.delete_version):
                with pytest.raises(NotFound, match="does not exist"):
                    call("pumps", v)
            with pytest.raises(NotFound):
                store.set_live("pumps", v, actor="test", reason="overflow probe")
        assert store.live_version("pumps") == 1
    finally:
        store.close()


def _train(c: httpx.Client, source: str) -> httpx.Response:
    return c.post("/v1/models/pumps/trainings", json={"data": {"source": source}, "spec": {"target": "energy_kwh"}})


def test_source_names_too_long_or_looping_are_refused_with_relative_paths(server, rk):
    srv, settings = server
    data = os.path.realpath(settings["data_dir"])
    for folder in ("loops", "pumps"):
        os.makedirs(os.path.join(data, folder), exist_ok=True)
    # a <-> b: a symbolic link loop inside the data folder, and a link pointing at itself
    for name, target in (("a.csv", "b.csv"), ("b.csv", "a.csv"), ("self.csv", "self.csv")):
        link = os.path.join(data, "loops", name)
        if not os.path.lexists(link):
            os.symlink(target, link)
    os.makedirs(os.path.join(data, "deep"), exist_ok=True)
    if not os.path.lexists(os.path.join(data, "deep", "up")):
        os.symlink("up", os.path.join(data, "deep", "up"))  # a folder link that loops: deep/up/up/...
    long_name = "x" * 300 + ".csv"  # over NAME_MAX (255 bytes, from memory)
    cases = {
        long_name: "name too long",
        f"pumps/{'y' * 256}/june.csv": "name too long",
        "loops/a.csv": "symbolic link loop",
        "loops/self.csv": "symbolic link loop",
        "deep/up/x.csv": "symbolic link loop",
    }
    with httpx.Client(base_url=srv.base, timeout=60) as c:
        for source, short in cases.items():
            for spec in ({"target": "energy_kwh"}, {"target": "energy_kwh", "execution": {"mode": "streaming"}}):
                r = c.post("/v1/models/pumps/trainings", json={"data": {"source": source}, "spec": spec})
                p = rk.assert_problem(r, 422)
                assert p["errors"][0]["field"] == "data.source" and p["errors"][0]["message"] == short, (source, p)
                assert source[:40] in p["detail"], p["detail"]
                assert data not in r.text and settings["data_dir"] not in r.text, r.text
        assert c.get("/v1/trainings").json()["trainings"] == []  # nothing was queued


@contextlib.contextmanager
def read_only_disk(path: Path):
    """A tmpfs at ``path``; yields a function ``ro(flag)`` that remounts it read-only (True) or writable.

    A real read-only file system (EROFS from the kernel), not a permission bit: as root, chmod stops no
    write, and a monkeypatched os call would not reach pyarrow's own file writer."""
    path.mkdir(parents=True, exist_ok=True)
    res = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64m", "tmpfs", str(path)], capture_output=True, text=True)
    if res.returncode != 0:
        reason = f"cannot mount a tmpfs here ({res.stderr.strip() or res.returncode}); run as root"
        if os.environ.get("TIKHON_CI_FULL"):
            pytest.fail(reason)
        pytest.skip(reason)

    def ro(flag: bool) -> None:
        subprocess.run(["mount", "-o", f"remount,{'ro' if flag else 'rw'}", str(path)], check=True)

    try:
        yield ro
    finally:
        subprocess.run(["mount", "-o", "remount,rw", str(path)], check=False)
        subprocess.run(["umount", "-l", str(path)], check=False)


def test_training_on_a_read_only_store_is_a_storage_failure(tmp_path, rk):
    """The store folder on a file system remounted read-only (the catalog elsewhere, as with PostgreSQL):
    a JSON and a multipart submission answer 507 storage-failure like a full disk, nothing is written, and
    the same submission is accepted once the store is writable again."""
    disk = tmp_path / "disk"
    with read_only_disk(disk) as ro:
        settings = rk.base_settings(tmp_path, embedded_worker=False, store=str(disk / "store"),
                                    database_url=f"sqlite:///{tmp_path / 'catalog.db'}")
        store = rk.open_store(settings)
        rk.publish_demo(store, "pumps", n=200, seed=41)
        store.close()
        body = {"data": {"csv": rk.csv_text(rk.demo_rows(300, seed=42))}, "spec": rk.QUICK_SPEC}
        with rk.server_process(tmp_path, **settings) as server:
            ro(True)
            snap = rk.store_snapshot(settings["store"], rk.catalog_url_of(settings))
            r = httpx.post(f"{server.base}/v1/models/pumps/trainings", json=body, timeout=120)
            p = rk.assert_problem(r, 507)
            assert p["type"] == "/problems/storage-failure" and "Read-only file system" in p["detail"], p
            assert str(disk) not in r.text  # the store's path stays relative (item 7)
            r = httpx.post(f"{server.base}/v1/models/pumps/trainings", timeout=120,
                           files={"file": ("june.csv", body["data"]["csv"].encode(), "text/csv")},
                           data={"spec": json.dumps(rk.QUICK_SPEC)})
            assert rk.assert_problem(r, 507)["type"] == "/problems/storage-failure"
            assert httpx.get(f"{server.base}/readyz", timeout=60).status_code == 503
            assert rk.store_snapshot(settings["store"], rk.catalog_url_of(settings)) == snap
            assert httpx.get(f"{server.base}/v1/trainings", timeout=60).json()["trainings"] == []
            assert server.alive()
            ro(False)
            r = httpx.post(f"{server.base}/v1/models/pumps/trainings", json=body, timeout=120)
            assert r.status_code == 202 and r.json()["state"] == "queued", r.text
