"""Access control: route x (no key, revoked key, wrong scope, right scope), from the OpenAPI document.

Run against a real server process with four keys: one per scope and a revoked admin key (the strongest
key there is, revoked: it must open nothing). Every operation of ``/openapi.json`` is called with each
credential; an operation that declares no security requirement must be one of the open routes, and a
``/v1`` operation must declare at least one scope. A route added later is covered without editing this
file.

Also here: keys are compared in constant time (the code path is read with ``ast`` and exercised with a
spy), keys never reach the logs of a real server run (the log file is searched for every secret), and
the overview page's sign-in cookie is HttpOnly and SameSite. The policy expectations are written out
independently of the code (common practice: least privilege, fail closed).
"""

from __future__ import annotations

import ast
import inspect
import re
import textwrap

import httpx
import pytest

SCOPES = ("predict", "train", "admin", "metrics")
OPEN_ROUTES = {("GET", "/healthz"), ("GET", "/readyz"), ("GET", "/problems"), ("GET", "/problems/{slug}")}
# Outside /v1 but keyed once keys exist: the Prometheus scrape (its counters name models and versions).
KEYED_OUTSIDE_V1 = {("GET", "/metrics"): {"metrics", "admin"}}


@pytest.fixture(scope="module")
def keyed(tmp_path_factory, rk):
    root = tmp_path_factory.mktemp("matrix")
    settings = rk.base_settings(root, embedded_worker=False, log_level="info")
    store = rk.open_store(settings)
    rk.publish_demo(store, "pumps", n=200, seed=5)
    keys = {scope: store.keys.create([scope], f"matrix {scope}")[1] for scope in SCOPES}
    revoked_id, revoked = store.keys.create(["admin"], "matrix revoked admin")
    store.keys.revoke(revoked_id)
    store.close()
    with rk.server_process(root, **settings) as server:
        yield server, keys, revoked


def operations(base: str):
    doc = httpx.get(f"{base}/openapi.json", timeout=60).json()
    out = []
    for path, item in doc["paths"].items():
        for method, op in item.items():
            if method in ("get", "post", "put", "delete", "patch"):
                declared = {s for req in op.get("security", []) for s in req.get("bearerKey", [])}
                out.append((method.upper(), path, declared))
    return out


def concrete(path: str) -> str:
    fill = {"{name}": "pumps", "{version}": "1", "{job_id}": "0" * 32, "{key_id}": "0" * 12, "{slug}": "forbidden"}
    return re.sub(r"\{[^}]+\}", lambda m: fill.get(m.group(0), "x"), path)


# A body for each method that cannot change anything even when authorized (it fails validation or names
# nothing that exists), so the matrix leaves the store as it found it.
HARMLESS = {"POST": b'{"no such field": 1}', "PUT": b'{"version": 999999}', "DELETE": None, "GET": None}


def call(c: httpx.Client, method: str, url: str, secret: str | None):
    headers = {"content-type": "application/json"}
    if secret is not None:
        headers["authorization"] = f"Bearer {secret}"
    return c.request(method, url, content=HARMLESS.get(method), headers=headers)


def test_route_by_credential_matrix(keyed, rk):
    server, keys, revoked = keyed
    ops = operations(server.base)
    assert len(ops) >= 25
    cells = 0
    with httpx.Client(base_url=server.base, timeout=60) as c:
        for method, path, declared in ops:
            url = concrete(path)
            if not path.startswith("/v1/") and (method, path) not in KEYED_OUTSIDE_V1:
                assert (method, path) in OPEN_ROUTES, f"{method} {path} is outside /v1 but not a known open route"
                assert not declared
                r = call(c, method, url, None)
                assert r.status_code not in (401, 403), (method, path, r.status_code)
                cells += 1
                continue
            assert declared, f"{method} {path} declares no scope"
            assert declared <= set(SCOPES) and "admin" in declared, (method, path, declared)
            assert declared == KEYED_OUTSIDE_V1.get((method, path), declared), (method, path, declared)
            # the metrics scope opens the scrape and nothing else (least privilege)
            assert ("metrics" in declared) == ((method, path) in KEYED_OUTSIDE_V1), (method, path, declared)
            # no key
            p = rk.assert_problem(call(c, method, url, None), 401)
            assert p["type"] == "/problems/unauthorized"
            # revoked key (an admin key: revoked, it opens nothing)
            r = call(c, method, url, revoked)
            assert rk.assert_problem(r, 401)["type"] == "/problems/unauthorized"
            assert r.headers["www-authenticate"].lower().startswith("bearer")
            cells += 2
            for scope in SCOPES:
                r = call(c, method, url, keys[scope])
                if scope in declared:  # right scope: past the gate (the harmless body then fails or not)
                    assert r.status_code not in (401, 403), (method, path, scope, r.text)
                else:  # wrong scope
                    p = rk.assert_problem(r, 403)
                    assert p["type"] == "/problems/forbidden" and sorted(declared) == p["allowed"]
                cells += 1
    print(f"\naccess matrix: {len(ops)} operations, {cells} cells")


@pytest.mark.parametrize("header", [
    "Bearer", "Basic {secret}", "bearer{secret}", "Bearer {secret}x", "Bearer x{secret}",
    "Bearer {upper}", "Bearer {secret} {secret}", "Token {secret}", "Bearer tikhon_000000000000_" + "A" * 43,
])
def test_malformed_or_altered_keys_open_nothing(keyed, rk, header):
    server, keys, _ = keyed
    secret = keys["admin"]
    value = header.format(secret=secret, upper=secret.upper())
    r = httpx.get(f"{server.base}/v1/models", headers={"authorization": value}, timeout=60)
    assert rk.assert_problem(r, 401)["type"] == "/problems/unauthorized"


def test_authorization_comes_before_validation(keyed, rk):
    """An anonymous caller learns nothing from validation errors: malformed input without a key is a 401."""
    server, _, _ = keyed
    for method, url, body in (("POST", "/v1/models/pumps/predictions", b"{not json"),
                              ("POST", "/v1/models/BAD NAME/trainings", b"[]"),
                              ("GET", "/v1/models/pumps/versions/not-a-number", None),
                              ("PUT", "/v1/models/pumps/live", b'{"version": "x"}')):
        r = httpx.request(method, f"{server.base}{url}", content=body, headers={"content-type": "application/json"}, timeout=60)
        rk.assert_problem(r, 401)


def test_cookie_authorizes_reads_only(keyed, rk):
    """The sign-in cookie stands in for the key on GET only: a cross-site form POST carrying the cookie
    (CSRF) changes nothing."""
    server, keys, _ = keyed
    jar = {"tikhon_key": keys["admin"]}
    with httpx.Client(base_url=server.base, cookies=jar) as c:
        assert c.get("/v1/models").status_code == 200
        rk.assert_problem(c.put("/v1/models/pumps/live", json={"version": 1, "reason": "csrf"}), 401)
        rk.assert_problem(c.post("/v1/keys", json={"scopes": ["admin"], "label": "csrf"}), 401)
        rk.assert_problem(c.delete("/v1/models/pumps/versions/1"), 401)


def test_sign_in_cookie_is_httponly_and_samesite(keyed):
    server, keys, _ = keyed
    own = {"Origin": server.base}  # what a browser sends with this server's own sign-in form
    r = httpx.post(f"{server.base}/login", data={"key": keys["predict"], "next": "/"}, headers=own, timeout=60)
    assert r.status_code == 303
    cookies = [v for k, v in r.headers.multi_items() if k.lower() == "set-cookie"]
    assert len(cookies) == 1
    attrs = [a.strip().lower() for a in cookies[0].split(";")]
    assert attrs[0].startswith("tikhon_key=")
    assert "httponly" in attrs
    assert "samesite=strict" in attrs
    assert "path=/" in attrs
    # a wrong key sets no cookie
    bad = httpx.post(f"{server.base}/login", data={"key": "tikhon_000000000000_" + "B" * 43, "next": "/"}, headers=own,
                     timeout=60)
    assert bad.status_code == 401 and "set-cookie" not in bad.headers


def test_keys_are_compared_in_constant_time_in_the_code_path():
    """Read the verification code: the stored hash is compared with hmac.compare_digest, and no secret or
    digest is compared with == / != (a short-circuiting comparison leaks the matching prefix length)."""
    from service.store.keys import Keys

    tree = ast.parse(textwrap.dedent(inspect.getsource(Keys.verify)))
    calls = {ast.unparse(n.func) for n in ast.walk(tree) if isinstance(n, ast.Call)}
    assert "hmac.compare_digest" in calls
    for node in ast.walk(tree):
        if isinstance(node, ast.Compare) and any(isinstance(op, (ast.Eq, ast.NotEq)) for op in node.ops):
            names = {n.id for n in ast.walk(node) if isinstance(n, ast.Name)} | \
                    {n.attr for n in ast.walk(node) if isinstance(n, ast.Attribute)}
            assert not names & {"secret", "digest", "stored", "secret_sha256"}, ast.unparse(node)


def test_every_verification_goes_through_compare_digest(tmp_path, rk, monkeypatch):
    """Behaviour: a right key, a wrong secret for an existing key id, and an unknown key id each cost one
    compare_digest call on full-length digests (the miss compares against a dummy hash, so a miss and a
    hit do the same work)."""
    import hmac

    import service.store.keys as keys_module

    settings = rk.base_settings(tmp_path)
    store = rk.open_store(settings, catalog_ttl_s=0.0)
    try:
        key_id, secret = store.keys.create(["predict"], "spy")
        seen = []
        real = hmac.compare_digest

        def spy(a, b):
            seen.append((len(a), len(b)))
            return real(a, b)

        monkeypatch.setattr(keys_module.hmac, "compare_digest", spy)
        assert store.keys.verify(secret)["key_id"] == key_id
        wrong = secret[:-1] + ("A" if secret[-1] != "A" else "B")
        assert store.keys.verify(wrong) is None
        assert store.keys.verify(f"tikhon_{'f' * 12}_{'C' * 43}") is None
        assert store.keys.verify("not a key at all") is None
        assert seen == [(64, 64)] * 4
    finally:
        store.close()


def test_keys_never_appear_in_the_logs(tmp_path, rk):
    """A server logging at debug level sees keys in every place a key travels; its whole log (stderr, JSON
    lines) must not contain any secret, nor the random part of one."""
    settings = rk.base_settings(tmp_path, embedded_worker=False, log_level="debug")
    store = rk.open_store(settings)
    rk.publish_demo(store, "pumps", n=200, seed=6)
    keys = {scope: store.keys.create([scope], f"log {scope}")[1] for scope in SCOPES}
    revoked_id, revoked = store.keys.create(["admin"], "log revoked")
    store.keys.revoke(revoked_id)
    store.close()
    made = []
    with rk.server_process(tmp_path, **settings) as server:
        b = server.base
        for scope, secret in keys.items():
            h = {"authorization": f"Bearer {secret}"}
            httpx.get(f"{b}/v1/models", headers=h, timeout=60)
            httpx.post(f"{b}/v1/models/pumps/predictions", headers=h, json={"rows": [{"flow_lps": 50.0, "head_m": 30.0}]}, timeout=60)
            httpx.put(f"{b}/v1/models/pumps/live", headers=h, json={"version": 1, "reason": "log test"}, timeout=60)
            httpx.get(f"{b}/v1/models", headers={"authorization": f"Bearer {secret}x"}, timeout=60)
            httpx.get(f"{b}/v1/models", cookies={"tikhon_key": secret}, timeout=60)
            httpx.get(f"{b}/", cookies={"tikhon_key": secret}, timeout=60)
            httpx.post(f"{b}/login", data={"key": secret, "next": "/"}, headers={"Origin": b}, timeout=60)
            httpx.post(f"{b}/login", data={"key": secret + "x", "next": "/"}, headers={"Origin": b}, timeout=60)
            httpx.post(f"{b}/v1/models/pumps/predictions", headers=h, content=b"{broken", timeout=60)  # an error path
        httpx.get(f"{b}/v1/models", headers={"authorization": f"Bearer {revoked}"}, timeout=60)
        created = httpx.post(f"{b}/v1/keys", headers={"authorization": f"Bearer {keys['admin']}"},
                             json={"scopes": ["predict"], "label": "made over HTTP"}, timeout=60)
        assert created.status_code == 201
        made.append(created.json()["secret"])
        log = server.log_text()
    assert '"request"' in log or "request" in log  # the server did log the requests (the test is not vacuous)
    assert log.count("\n") >= 30
    for secret in [*keys.values(), revoked, *made]:
        assert secret not in log
        assert secret.split("_", 2)[2] not in log  # the random part alone (tikhon_<key id>_<43 characters that may hold "_">)
