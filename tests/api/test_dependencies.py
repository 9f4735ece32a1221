"""Routes get the store and a checked model name from FastAPI dependencies (``service.api.dependencies``).

An invalid name is refused by the one ``ModelName`` dependency with the service's own problem (type
``/problems/invalid-name``, 422, RFC 9457) on every route that takes a name, before the handler runs and
after the key check; no route module outside the hot predict path and the HTML pages checks names itself.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from service.api import dependencies
from service.api.server import build
from service.settings import Settings

ROUTES = Path(dependencies.__file__).resolve().parent / "routes"
NAMED = [("GET", "/v1/models/{}"), ("GET", "/v1/models/{}/versions"), ("GET", "/v1/models/{}/versions/1"),
         ("GET", "/v1/models/{}/versions/1/cv"), ("GET", "/v1/models/{}/history"),
         ("GET", "/v1/models/{}/versions/1/plots/cv"), ("GET", "/v1/models/{}/plots/history"),
         ("DELETE", "/v1/models/{}/versions/1"), ("PUT", "/v1/models/{}/live"),
         ("POST", "/v1/models/{}/trainings"), ("POST", "/v1/models/{}/prune")]


@pytest.fixture(scope="module")
def app(tmp_path_factory):
    root = tmp_path_factory.mktemp("deps")
    app_, store, _ = build(Settings(store=root / "store", data_dir=root, auth_cache_s=0.0), embedded_worker=False)
    yield app_, store
    store.close()


@pytest.mark.parametrize("method,path", NAMED)
def test_every_named_route_refuses_a_bad_name_through_the_dependency(app, method, path):
    with TestClient(app[0]) as client:
        r = client.request(method, path.format("Bad.Name"), json={})
    assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json"
    assert r.json()["type"] == "/problems/invalid-name" and "Bad.Name" in r.json()["detail"]


def test_the_key_check_comes_before_the_name_check(app):
    app_, store = app
    key_id, _ = store.keys.create(["admin"], "deps test")
    try:
        with TestClient(app_) as client:
            r = client.get("/v1/models/Bad.Name")
        assert r.status_code == 401 and r.json()["type"] == "/problems/unauthorized"
    finally:
        store.keys.revoke(key_id)
        app_.state.gate.forget()


def test_route_modules_leave_names_and_the_store_to_the_dependencies():
    for module in ("models.py", "plots.py", "trainings.py", "admin.py"):
        tree = ast.parse((ROUTES / module).read_text(encoding="utf-8"))
        handlers = [n for n in ast.walk(tree) if isinstance(n, (ast.FunctionDef, ast.AsyncFunctionDef))
                    and any(isinstance(d, ast.Call) and getattr(d.func, "attr", "") in ("get", "post", "put", "delete")
                            for d in n.decorator_list)]
        assert handlers, module
        for fn in handlers:
            calls = {getattr(c.func, "id", getattr(c.func, "attr", "")) for c in ast.walk(fn) if isinstance(c, ast.Call)}
            source = ast.unparse(fn)
            assert "validate_name(name)" not in source, (module, fn.name)
            assert "request.app.state.store" not in source, (module, fn.name)
            if "name" in [a.arg for a in fn.args.args]:
                assert "ModelName" in ast.unparse(next(a for a in fn.args.args if a.arg == "name").annotation)
            assert "validate_name" not in calls or module == "trainings.py"  # the ?model= query of the job list
