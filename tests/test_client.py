"""The Python client against a real server (uvicorn on a loopback port, embedded worker).

* Every operation in the live ``/openapi.json`` has a client method, and the client has none for a
  route that does not exist (``Client.routes()`` against the document).
* One scenario calls every route through the client while an httpx event hook records the paths
  actually requested; the recorded set must cover the OpenAPI document.
* Failures arrive as ``ServiceError`` carrying the RFC 9457 problem members.
"""

from __future__ import annotations

import re

import httpx
import numpy as np
import pytest

from service.client import ClientProblem, Client, ConnectionFailed, InvalidArgument, ServiceError

SPEC = {
    "target": "energy_kwh",
    "features": ["flow_lps", "head_m"],
    "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2]}],
    "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e2, "count": 8}},
    "cv": {"scheme": "kfold", "folds": 4, "seed": 3},
}


def table(n: int, seed: int) -> dict[str, np.ndarray]:
    """energy = 3 + 0.5 flow + 0.02 flow*head + N(0, 1): invented, with a known structure."""
    rng = np.random.default_rng(seed)
    flow = rng.uniform(5.0, 120.0, n)
    head = rng.uniform(10.0, 60.0, n)
    return {"flow_lps": flow, "head_m": head, "energy_kwh": 3 + 0.5 * flow + 0.02 * flow * head + rng.normal(0, 1, n)}


def openapi_operations(url: str) -> set[tuple[str, str]]:
    doc = httpx.get(f"{url}/openapi.json").json()
    return {(method.upper(), path) for path, ops in doc["paths"].items() for method in ops
            if method in ("get", "post", "put", "delete", "patch")}


def to_template(path: str, templates: set[str]) -> str | None:
    for t in templates:
        pattern = "^" + re.sub(r"\\\{[^}]+\\\}", "[^/]+", re.escape(t)) + "$"
        if re.match(pattern, path):
            return t
    return None


@pytest.fixture(scope="module")
def server(live_service, tmp_path_factory):
    with live_service(tmp_path_factory.mktemp("client"), worker=True) as s:
        yield s


def test_client_has_a_method_for_every_route(server):
    url, _, _ = server
    ops = openapi_operations(url)
    mapped = Client.routes()
    missing = sorted(ops - set(mapped))
    assert not missing, f"the client lacks methods for {missing}"
    stale = sorted(set(mapped) - ops)
    assert not stale, f"client methods call routes the server does not have: {stale}"
    for op, method in mapped.items():
        assert callable(getattr(Client, method)), op


def test_every_route_called_through_the_client(server, live_service, tmp_path):
    url, _, _ = server
    ops = openapi_operations(url)
    templates = {path for _, path in ops}
    seen: set[tuple[str, str]] = set()

    def record(request: httpx.Request) -> None:
        t = to_template(request.url.path, templates)
        if t is not None:
            seen.add((request.method, t))

    hooks = {"request": [record]}
    cols = table(160, seed=11)
    rows = [dict(zip(cols, vals)) for vals in zip(*(cols[k].tolist() for k in cols))]
    with Client(url, event_hooks=hooks) as tk:
        assert tk.health() == {"status": "ok"}
        assert tk.ready()["status"] == "ready"
        progress: list[dict] = []
        job = tk.train("pump-c", rows=rows, spec=SPEC, promote="always")
        assert job["state"] in ("queued", "running")
        done = tk.wait(job, on_progress=progress.append, poll=0.1)
        assert done["state"] == "succeeded", done
        assert progress[-1] is done and done["progress"]["done"] == done["progress"]["total"] > 0
        assert done["version"] == 1 and tk.training(job["id"])["version"] == 1
        assert [j["id"] for j in tk.trainings(model="pump-c")] == [job["id"]]

        # A second version from an uploaded CSV file (multipart), published but not made live.
        csv_path = tmp_path / "more.csv"
        more = table(120, seed=12)
        csv_path.write_text("flow_lps,head_m,energy_kwh\n" + "\n".join(
            f"{a!r},{b!r},{c!r}" for a, b, c in zip(*(more[k].tolist() for k in more))) + "\n")
        second = tk.wait(tk.train("pump-c", file=csv_path, spec=SPEC, promote="never"), poll=0.1)
        assert second["state"] == "succeeded" and second["version"] == 2, second
        assert second["decision"]["went_live"] is False

        assert [m["name"] for m in tk.models()] == ["pump-c"]
        model = tk.model("pump-c")
        assert model["live_version"] == 1 and model["versions"] == [1, 2]
        assert model["live_metadata"]["version"] == 1 and "live" not in model  # the live version's metadata; "live" is a boolean elsewhere
        assert [v["version"] for v in tk.versions("pump-c")] == [1, 2]
        meta = tk.version("pump-c", 1)
        assert meta["live"] is True and meta["spec"]["cv"]["seed"] == 3
        cv = tk.cv("pump-c", 1)
        assert len(cv["table"]) == 2 * 8 and cv["chosen"]["basis"] == meta["chosen"]["basis"]
        path = tk.path("pump-c", 1)["path"]
        assert len(path["strengths"]) == len(path["coefficients"])
        exported = tk.export("pump-c", 1)
        assert exported["source"] == {"model": "pump-c", "version": 1, "manifest_sha256": meta["checksums"]["manifest_sha256"],
                                      "created_at": meta["created_at"]}
        assert tk.export("pump-c", 1, format="sklearn")[:1] == b"\x80"  # a pickle stream's PROTO opcode (joblib.dump)
        scored = tk.add_outcomes("pump-c", [{"flow_lps": 50.0, "head_m": 30.0, "energy_kwh": 40.0}], version=1)
        assert scored == {"model": "pump-c", "version": 1, "accepted": 1, "skipped": 0}
        assert tk.outcomes("pump-c", version=1, since="1d")["rows"] == 1
        assert tk.inputs("pump-c", version=1)["version"] == 1
        for kind in ("drift", "outside-range", "live-error"):
            assert b"<svg" in tk.plot_monitoring("pump-c", kind, version=1)[:400], kind

        # Live predictions with intervals: the client's answer is the server's answer, unchanged.
        query = [{"flow_lps": 50.0, "head_m": 30.0}, {"flow_lps": 90.5, "head_m": 12.25}]
        answer = tk.predict("pump-c", rows=query, interval_level=0.9)
        raw = httpx.post(f"{url}/v1/models/pump-c/predictions", json={"rows": query, "interval_level": 0.9}).json()
        assert answer == raw
        assert answer["model"]["version"] == 1
        for p in answer["predictions"]:
            lo, hi = p["interval"]
            assert lo < p["value"] < hi
        # Pinned version, CSV in and out; columns in, JSON out; the same numbers for version 1.
        text = tk.predict("pump-c", version=1, csv="flow_lps,head_m\n50.0,30.0\n90.5,12.25\n", as_csv=True)
        assert text.splitlines()[0] == "value,warnings"
        assert [float(line.split(",")[0]) for line in text.splitlines()[1:]] == [p["value"] for p in answer["predictions"]]
        pinned = tk.predict_version("pump-c", 2, columns={"flow_lps": [50.0], "head_m": [30.0]})
        assert pinned["model"]["version"] == 2 and "interval" not in pinned["predictions"][0]

        moved = tk.set_live("pump-c", 2, reason="client test: version 2 is trained on more recent rows")
        assert moved["live_version"] == 2
        hist = tk.history("pump-c")
        # version 2's own decision (published, not made live) is in the history before the change to it
        assert [(h["from_version"], h["to_version"], h["went_live"]) for h in hist] == [
            (None, 1, True), (1, 1, False), (1, 2, True)]
        assert hist[-1]["reason"].startswith("client test")

        for kind in ("cv", "path", "residuals"):
            figure = tk.plot("pump-c", 1, kind)
            assert b"<svg" in figure[:400], kind
        assert tk.plot_history("pump-c", format="png")[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)

        third = tk.wait(tk.train("pump-c", rows=rows, spec=SPEC, promote="never"), poll=0.1)
        assert third["version"] == 3
        tk.delete_version("pump-c", 1)
        assert [v["version"] for v in tk.versions("pump-c")] == [2, 3]
        pruned = tk.prune("pump-c", keep=0)
        assert pruned["deleted"] == [3] and pruned["remaining"] == [2] and pruned["live_version"] == 2

        assert "/problems/not-found" in {p["type"] for p in tk.problem_types().values()}
        assert "Not found" in tk.problem_type("not-found")
        assert "tikhon" in tk.metrics()

    # Cancelling needs a job that stays queued, and keys close a server for good (the last admin key cannot
    # be revoked over HTTP): a second server without a worker, keys last.
    with live_service(tmp_path / "idle", worker=False) as (idle, _, _):
        with Client(idle, event_hooks=hooks) as tk:
            queued = tk.train("pump-q", rows=rows, spec=SPEC)
            assert tk.cancel(queued)["state"] == "cancelled"
            assert tk.training(queued["id"])["state"] == "cancelled"
            assert "tikhon" in tk.metrics()
            # Keys last: once one exists every /v1 route needs one.
            made = tk.create_key(["admin"], label="client test")
            assert made["secret"].startswith("tikhon_") and made["scopes"] == ["admin"]
            with pytest.raises(ServiceError) as err:
                tk.models()
            assert err.value.status == 401 and err.value.type == "/problems/unauthorized"
        with Client(idle, key=made["secret"], event_hooks=hooks) as admin:
            assert [k["key_id"] for k in admin.keys()] == [made["key_id"]]
            reader = admin.create_key("predict", label="reader")
            with Client(idle, key=reader["secret"]) as tk:
                assert [j["state"] for j in tk.trainings(model="pump-q")] == ["cancelled"]
                with pytest.raises(ServiceError) as err:
                    tk.keys()
                assert err.value.status == 403
            assert admin.revoke_key(reader["key_id"])["active"] is False
            with Client(idle, key=reader["secret"]) as tk, pytest.raises(ServiceError) as err:
                tk.models()
            assert err.value.status == 401
            with pytest.raises(ServiceError) as err:  # the last admin key: only `tikhon keys revoke --local`
                admin.revoke_key(made["key_id"])
            assert err.value.status == 409 and "last active admin key" in str(err.value)
            assert admin.keys()[0]["active"] is True

    missing = sorted(ops - seen)
    assert not missing, f"routes not exercised through the client: {missing}"


def test_errors_carry_the_problem_fields(server):
    url, _, _ = server
    with Client(url) as tk:
        with pytest.raises(ServiceError) as err:
            tk.model("no-such-model")
        e = err.value
        assert (e.status, e.type, e.title) == (404, "/problems/not-found", "Not found")
        assert "no-such-model" in e.detail and e.instance == "/v1/models/no-such-model" and e.request_id
        assert isinstance(e, ClientProblem) and "\n" not in str(e)

        cols = table(40, seed=5)
        rows = [dict(zip(cols, vals)) for vals in zip(*(cols[k].tolist() for k in cols))]
        with pytest.raises(ServiceError) as err:
            tk.train("pump-bad", rows=rows, spec={**SPEC, "target": "energy"})
        e = err.value
        assert e.status == 422 and e.type == "/problems/invalid-spec"
        assert e.errors and e.errors[0]["field"] == "target" and e.errors[0]["value"] == "energy"
        assert e.body["detail"] == e.detail

        with pytest.raises(InvalidArgument) as err:  # a caller's mistake: a ValueError, nothing was sent
            tk.train("pump-bad", rows=rows, csv="a,b\n1,2\n", spec=SPEC)
        assert "exactly one of" in str(err.value) and not isinstance(err.value, ServiceError)


def test_unreachable_server_is_one_service_error():
    sock = __import__("socket").socket()
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    sock.close()  # nothing listens on this port now
    with Client(f"http://127.0.0.1:{port}", timeout=5) as tk, pytest.raises(ConnectionFailed) as err:
        tk.health()
    assert err.value.status == 0 and f"127.0.0.1:{port}" in err.value.detail and "tikhon serve" in err.value.detail


def test_ordinary_least_squares_through_the_client_matches_scikit_learn(server):
    """Linear basis, penalty strength 0 only: the served prediction is the OLS fit. Reference:
    scikit-learn's LinearRegression (an independent implementation), to 1e-9 relative."""
    from sklearn.linear_model import LinearRegression

    url, _, _ = server
    cols = table(200, seed=21)
    spec = {"target": "energy_kwh", "features": ["flow_lps", "head_m"], "bases": [{"kind": "linear"}],
            "penalty": {"kind": "l2", "strengths": [0.0]}, "cv": {"folds": 5, "seed": 1}}
    with Client(url) as tk:
        done = tk.wait(tk.train("pump-ols", columns=cols, spec=spec, promote="always"), poll=0.1)
        assert done["state"] == "succeeded", done
        fresh = table(25, seed=22)
        got = [p["value"] for p in tk.predict("pump-ols", columns={k: fresh[k] for k in ("flow_lps", "head_m")})["predictions"]]
    X = np.column_stack([cols["flow_lps"], cols["head_m"]])
    ref = LinearRegression().fit(X, cols["energy_kwh"]).predict(np.column_stack([fresh["flow_lps"], fresh["head_m"]]))
    np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-9)


@pytest.mark.postgres
def test_two_api_replicas_and_a_separate_worker_share_a_postgresql_catalog(live_service, postgres_catalog_url, tmp_path):
    """The README's layout: API replicas without embedded workers, a separate `tikhon worker` process,
    one PostgreSQL catalog and one store folder. A job submitted through one replica is trained by the
    worker and seen, served and guarded identically through the other."""
    import os
    import signal
    import subprocess
    import sys

    shared = {"database_url": postgres_catalog_url, "store": tmp_path / "store", "data_dir": tmp_path / "data"}
    with live_service(tmp_path / "a", worker=False, **shared) as (a, _, _), \
            live_service(tmp_path / "b", worker=False, **shared) as (b, _, _):
        env = {k: v for k, v in os.environ.items() if not k.startswith("TIKHON_")}
        env.update(TIKHON_DATABASE_URL=postgres_catalog_url, TIKHON_STORE=str(tmp_path / "store"),
                   TIKHON_DATA_DIR=str(tmp_path / "data"), TIKHON_WORKER_POLL_S="0.05",
                   TIKHON_WORKER_HEARTBEAT_S="0.2", TIKHON_LOG_LEVEL="warning")
        worker = subprocess.Popen([sys.executable, "-m", "service.cli", "worker"], env=env,
                                  stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        try:
            cols = table(150, seed=31)
            with Client(a) as ta, Client(b) as tb:
                job = ta.train("pump-rep", columns=cols, spec=SPEC, promote="always")
                done = tb.wait(job["id"], poll=0.1)
                assert done["state"] == "succeeded" and done["version"] == 1, done
                rows = [{"flow_lps": 33.0, "head_m": 41.0}]
                assert ta.predict("pump-rep", rows=rows, interval_level=0.8) == tb.predict("pump-rep", rows=rows, interval_level=0.8)
                made = ta.create_key("admin", label="replica test")
                # The key made through replica a comes to guard replica b once b's catalog cache (1 s)
                # expires: wait for that (a bounded wait for an event, not a timed assertion).
                import time

                deadline = time.monotonic() + 30
                while True:
                    try:
                        tb.models()
                    except ServiceError as err:
                        assert err.status == 401
                        break
                    assert time.monotonic() < deadline, "replica b never started asking for the key"
                    time.sleep(0.1)
            with Client(b, key=made["secret"]) as tb, Client(a, key=made["secret"]) as ta:
                again = tb.wait(tb.train("pump-rep", columns=cols, spec=SPEC, promote="never"), poll=0.1)
                assert again["version"] == 2
                tb.set_live("pump-rep", 2, reason="replica test")
                assert ta.model("pump-rep")["live_version"] == 2
                # Replica a answers with version 2 once its one-second catalog cache expires (a bounded wait).
                deadline = time.monotonic() + 30
                while ta.predict("pump-rep", rows=rows)["model"]["version"] != 2:
                    assert time.monotonic() < deadline, "replica a kept answering with version 1"
                    time.sleep(0.1)
                assert [(h["to_version"], h["went_live"]) for h in ta.history("pump-rep")] == [(1, True), (1, False), (2, True)]
        finally:
            worker.send_signal(signal.SIGTERM)
            _, err_text = worker.communicate(timeout=60)
        assert worker.returncode == 0, err_text
