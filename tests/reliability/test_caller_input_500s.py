"""Caller input that used to end in a 500 (issue 11, items 9, 10 and 11), against a real server process.

* A version number beyond the catalog's integer range answers 404 or 422, never 500 (the catalog's
  version column is a 32-bit INTEGER on PostgreSQL, 64-bit on SQLite; Python's ``int()`` also refuses
  strings of more than 4300 digits: common practice to check digits and length before converting).
* A ``source`` whose file name is too long (ENAMETOOLONG, a component over NAME_MAX = 255 bytes on Linux
  file systems, from memory) or a symbolic link loop inside the data folder (ELOOP) answers 422 naming the
  path relative to the data folder, never 500, and never the folder's absolute path.
"""

from __future__ import annotations

import os

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
                                       ("POST", f"/v1/models/pumps/versions/{v}/predict", row),
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
        assert c.post("/v1/models/pumps/versions/1/predict", json=row).status_code == 200


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
