"""Access holes found by an outside probe (issue 11, items 5, 6 and 8), against real server processes.

* A server that runs with keys required stays closed: the last active admin key cannot be revoked over
  HTTP (409), and when every key disappears (revoked on the machine, or rows lost from the catalog) each
  guarded route answers 401 while the health routes keep answering.
* ``POST /login`` refuses a post whose Origin is absent, ``null`` or another site's (login CSRF).
* ``/metrics`` needs a key with the ``metrics`` (or ``admin``) scope once any key exists, and that scope
  opens nothing else; with no key at all it stays open (the server then listens on loopback only).

The policy is written out here independently of the code (common practice: fail closed, least
privilege; the Origin rule follows the Fetch standard, which has browsers send Origin on form POSTs).
"""

from __future__ import annotations

import json
import subprocess
import sys
import time

import httpx
import sqlalchemy as sa


def _bearer(secret: str) -> dict[str, str]:
    return {"authorization": f"Bearer {secret}"}


def _cli(rk, settings: dict, *args: str, url: str | None = None, key: str | None = None
         ) -> subprocess.CompletedProcess:
    """``tikhon ...`` as an operator on the server's machine runs it (the server's TIKHON_* settings)."""
    env = rk.settings_env(settings)
    if url:
        env["TIKHON_URL"] = url
    if key:
        env["TIKHON_KEY"] = key
    return subprocess.run([sys.executable, "-m", "service.cli", *args], capture_output=True, text=True, env=env,
                          timeout=300)


# A little more than the store's catalog cache (Store(catalog_ttl_s=1.0), the server's default): after it, the
# server reads the key table again, so an answer then reflects the emptied table, not a cached row.
CATALOG_TTL_S = 1.5

GUARDED = (("GET", "/v1/models"), ("GET", "/v1/models/pumps"), ("POST", "/v1/models/pumps/predictions"),
           ("GET", "/v1/keys"), ("POST", "/v1/keys"), ("GET", "/metrics"))


def test_last_admin_key_is_kept_and_a_keyless_server_stays_closed(tmp_path, rk):
    settings = rk.base_settings(tmp_path, embedded_worker=False)
    store = rk.open_store(settings)
    rk.publish_demo(store, "pumps", n=200, seed=11)
    admin_id, admin = store.keys.create(["admin"], "operator")
    store.close()
    row = {"rows": [{"flow_lps": 50.0, "head_m": 30.0}]}
    with rk.server_process(tmp_path, **settings) as server:
        b = server.base
        made = httpx.post(f"{b}/v1/keys", headers=_bearer(admin), json={"scopes": ["admin"], "label": "second"},
                          timeout=60).json()
        # two admin keys: one of them may go over HTTP, the other one then may not
        r = httpx.delete(f"{b}/v1/keys/{made['key_id']}", headers=_bearer(admin), timeout=60)
        assert r.status_code == 200 and r.json()["active"] is False
        r = httpx.delete(f"{b}/v1/keys/{admin_id}", headers=_bearer(admin), timeout=60)
        p = rk.assert_problem(r, 409)
        assert p["type"] == "/problems/conflict"
        assert "last active admin key" in p["detail"] and f"tikhon keys revoke --local {admin_id}" in p["detail"]
        assert httpx.get(f"{b}/v1/keys", headers=_bearer(admin), timeout=60).json()["keys"][0]["active"] is True

        # On the server's machine it can be revoked; the running server does not open up again.
        r = _cli(rk, settings, "--json", "keys", "revoke", "--local", admin_id)
        assert r.returncode == 0, r.stderr
        assert json.loads(r.stdout)["active"] is False
        time.sleep(CATALOG_TTL_S)  # let the server's catalog cache see the change (waiting, not a timed check)
        for method, path in GUARDED:
            body = row if path.endswith("/predictions") else ({"scopes": ["admin"]} if path == "/v1/keys" else None)
            for headers in ({}, _bearer(admin)):
                r = httpx.request(method, f"{b}{path}", json=body, headers=headers, timeout=60)
                p = rk.assert_problem(r, 401)
                assert "no active key exists" in p["detail"] or "unknown or revoked" in p["detail"], p
        assert httpx.post(f"{b}/v1/models/pumps/predictions", json=row, timeout=60).status_code == 401
        page = httpx.get(f"{b}/", timeout=60)
        assert page.status_code == 303 and page.headers["location"].startswith("/login")
        assert httpx.get(f"{b}/healthz", timeout=60).status_code == 200
        assert httpx.get(f"{b}/readyz", timeout=60).status_code == 200

        # A new key made on the machine opens the routes to that key (and only to it).
        r = _cli(rk, settings, "--json", "keys", "create", "--local", "--scope", "admin", "--label", "recovered")
        assert r.returncode == 0, r.stderr
        fresh = json.loads(r.stdout)["secret"]
        assert httpx.get(f"{b}/v1/models", headers=_bearer(fresh), timeout=60).status_code == 200
        assert httpx.get(f"{b}/v1/models", timeout=60).status_code == 401


def test_keys_lost_from_the_catalog_before_any_request_leave_the_server_closed(tmp_path, rk):
    """The server started with a key; the catalog then loses every key row (not revoked: gone) before the
    first request. The routes must not open (answer 401), health routes still answer."""
    settings = rk.base_settings(tmp_path, embedded_worker=False)
    store = rk.open_store(settings)
    rk.publish_demo(store, "pumps", n=200, seed=12)
    store.keys.create(["admin"], "operator")
    store.close()
    with rk.server_process(tmp_path, **settings) as server:
        engine = sa.create_engine(rk.catalog_url_of(settings))
        try:
            with engine.begin() as conn:
                assert conn.execute(sa.text("DELETE FROM api_keys")).rowcount == 1
        finally:
            engine.dispose()
        time.sleep(CATALOG_TTL_S)  # let the server's catalog cache see the change (waiting, not a timed check)
        for method, path in GUARDED:
            r = httpx.request(method, f"{server.base}{path}", json={"rows": [{"flow_lps": 1.0, "head_m": 1.0}]},
                              timeout=60)
            assert "no active key exists" in rk.assert_problem(r, 401)["detail"], path
        assert httpx.get(f"{server.base}/healthz", timeout=60).status_code == 200


def test_login_refuses_missing_null_and_foreign_origins(tmp_path, rk):
    settings = rk.base_settings(tmp_path, embedded_worker=False)
    store = rk.open_store(settings)
    _, reader = store.keys.create(["predict"], "dashboard")
    store.close()
    with rk.server_process(tmp_path, **settings) as server:
        b = server.base
        # the form's page must not be served with "no-referrer": a browser would then post it with Origin: null
        # (Fetch standard, "append a request Origin header"), and the refusal below would lock everyone out
        assert httpx.get(f"{b}/login", timeout=60).headers["referrer-policy"] == "same-origin"
        form = {"key": reader, "next": "/"}
        for origin in (None, "null", "NULL", "http://evil.example", f"http://127.0.0.1:{int(b.rsplit(':', 1)[1]) + 1}",
                       f"http://127.0.0.1:{b.rsplit(':', 1)[1]}.evil.example", "file://", f"ftp://{b.split('://')[1]}"):
            headers = {} if origin is None else {"Origin": origin}
            r = httpx.post(f"{b}/login", data=form, headers=headers, timeout=60)
            assert r.status_code == 403, (origin, r.status_code)
            assert "Sign-in refused" in r.text and "set-cookie" not in r.headers, origin
        ok = httpx.post(f"{b}/login", data=form, headers={"Origin": b}, timeout=60)
        assert ok.status_code == 303 and ok.headers["set-cookie"].startswith("tikhon_key=")
        # "localhost" is another origin than "127.0.0.1" for a browser: the Host header decides
        r = httpx.post(f"{b}/login", data=form, headers={"Origin": b.replace("127.0.0.1", "localhost")}, timeout=60)
        assert r.status_code == 403


def test_metrics_needs_the_metrics_scope_once_keys_exist(tmp_path, rk):
    settings = rk.base_settings(tmp_path, embedded_worker=False)
    store = rk.open_store(settings)
    rk.publish_demo(store, "pumps", n=200, seed=13)
    store.close()
    with rk.server_process(tmp_path, **settings) as server:
        b = server.base
        # no key at all: open (this server listens on loopback only)
        r = httpx.get(f"{b}/metrics", timeout=60)
        assert r.status_code == 200 and "tikhon_http_requests_total" in r.text
        # the first key over loopback, then a metrics key each way: HTTP, the CLI through the server, --local
        admin = httpx.post(f"{b}/v1/keys", json={"scopes": ["admin"], "label": "operator"}, timeout=60).json()["secret"]
        made = httpx.post(f"{b}/v1/keys", headers=_bearer(admin), json={"scopes": ["metrics"], "label": "scraper"},
                          timeout=60)
        assert made.status_code == 201 and made.json()["scopes"] == ["metrics"]
        r = _cli(rk, settings, "--json", "keys", "create", "--scope", "metrics", url=b, key=admin)
        assert r.returncode == 0, r.stderr
        via_cli = json.loads(r.stdout)
        r = _cli(rk, settings, "--json", "keys", "create", "--local", "--scope", "metrics")
        assert r.returncode == 0, r.stderr
        via_local = json.loads(r.stdout)
        assert via_cli["scopes"] == via_local["scopes"] == ["metrics"]
        predict = httpx.post(f"{b}/v1/keys", headers=_bearer(admin), json={"scopes": ["predict"]}, timeout=60).json()

        assert rk.assert_problem(httpx.get(f"{b}/metrics", timeout=60), 401)["type"] == "/problems/unauthorized"
        p = rk.assert_problem(httpx.get(f"{b}/metrics", headers=_bearer(predict["secret"]), timeout=60), 403)
        assert p["allowed"] == ["admin", "metrics"]
        for secret in (made.json()["secret"], via_cli["secret"], via_local["secret"], admin):
            r = httpx.get(f"{b}/metrics", headers=_bearer(secret), timeout=60)
            assert r.status_code == 200 and "# HELP tikhon_" in r.text
        # the metrics scope opens the scrape only: not a model, not a prediction, not the page
        scraper = _bearer(made.json()["secret"])
        assert httpx.get(f"{b}/v1/models", headers=scraper, timeout=60).status_code == 403
        assert httpx.post(f"{b}/v1/models/pumps/predictions", headers=scraper,
                          json={"rows": [{"flow_lps": 1.0, "head_m": 1.0}]}, timeout=60).status_code == 403
        r = httpx.post(f"{b}/login", data={"key": made.json()["secret"], "next": "/"}, headers={"Origin": b}, timeout=60)
        assert r.status_code == 403
        doc = httpx.get(f"{b}/openapi.json", timeout=60).json()
        declared = {s for req in doc["paths"]["/metrics"]["get"]["security"] for s in req["bearerKey"]}
        assert declared == {"metrics", "admin"}
