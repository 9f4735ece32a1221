"""Every bad input gets a 4xx problem (RFC 9457) naming what is wrong, and nothing is stored."""

from __future__ import annotations

import os

import httpx
import pytest

from service.engine import tune

ROWS_LIMIT = 50
BODY_LIMIT = 200_000


@pytest.fixture(scope="module")
def plain(tmp_path_factory, kit):
    root = tmp_path_factory.mktemp("bad")
    with kit.service(root, worker=False, max_rows_per_request=ROWS_LIMIT, max_body_bytes=BODY_LIMIT,
                     max_training_rows=2000, max_grid_fits=10_000) as (base, store, settings):
        # One model published straight through the store (no worker here), for the predict cases.
        result = tune(kit.pump_table(120, seed=31), kit.SPEC)
        body, arrays = result.to_artifact()
        store.publish("pump-b", body, arrays)
        store.set_live("pump-b", 1, actor="test", reason="fixture")
        data = settings.data_dir
        (data / "drop").mkdir()
        (data / "drop" / "june.csv").write_text("flow_lps,head_m,energy_kwh\n" + "\n".join(
            f"{10 + i},{20 + i % 7},{30 + 2 * i + (i % 3)}" for i in range(40)))
        (root / "outside.csv").write_text("flow_lps,head_m,energy_kwh\n1,2,3\n4,5,6\n")
        os.symlink(root / "outside.csv", data / "drop" / "escape.csv")
        yield base, store, settings


def snapshot(store, settings):
    jobs = store.jobs.list()
    staged = sorted(p.name for p in store.jobs.incoming_dir.iterdir())
    job_dirs = sorted(p.name for p in store.jobs.folder.iterdir() if p.name != store.jobs.incoming_dir.name)
    return [(j["id"], j["state"]) for j in jobs], staged, job_dirs, [m["name"] for m in store.list_models()]


def problem(r: httpx.Response, status: int) -> dict:
    assert r.status_code == status, (r.status_code, r.text)
    assert r.headers["content-type"] == "application/problem+json"
    body = r.json()
    assert body["status"] == status and body["title"] and body["detail"] and body["type"].startswith("/problems/")
    assert "Traceback" not in r.text
    return body


GOOD_ROWS = [{"flow_lps": 10.0 + i, "head_m": 20.0 + (i % 5), "energy_kwh": 30.0 + 2 * i + (i % 3)} for i in range(30)]
SPEC = {"target": "energy_kwh", "bases": [{"kind": "linear"}], "penalty": {"kind": "l2", "strengths": [0.1, 1.0]}}


def training_cases():
    J = {"content-type": "application/json"}
    return [
        ("malformed JSON", dict(content=b'{"data": {"rows": [', headers=J), 400, "not valid JSON"),
        ("NaN literal", dict(content=b'{"data": {"rows": [{"a": NaN}]}, "spec": {"target": "a"}}', headers=J), 400, "NaN"),
        ("Infinity literal", dict(content=b'{"data": {"rows": [{"a": 1e999}]}, "spec": {"target": "a"}}', headers=J), 400, "infinity"),
        ("body not an object", dict(json=[1, 2]), 422, "dictionary"),
        ("wrong type for promote", dict(json={"data": {"rows": GOOD_ROWS}, "spec": SPEC, "promote": 5}), 422, "promote"),
        ("unknown top-level field", dict(json={"data": {"rows": GOOD_ROWS}, "spec": SPEC, "colour": "red"}), 422, "colour"),
        ("two data kinds", dict(json={"data": {"rows": GOOD_ROWS, "csv": "a\n1"}, "spec": SPEC}), 422, "exactly one"),
        ("string in numeric column", dict(json={"data": {"rows": [dict(r, head_m="high") if i == 3 else r for i, r in enumerate(GOOD_ROWS)]}, "spec": SPEC}), 422, "mixes numbers"),
        ("null value", dict(json={"data": {"rows": [dict(r, head_m=None) if i == 2 else r for i, r in enumerate(GOOD_ROWS)]}, "spec": SPEC}), 422, "null"),
        ("ragged rows", dict(json={"data": {"rows": GOOD_ROWS[:3] + [{"flow_lps": 1.0}]}, "spec": SPEC}), 422, "lacks"),
        ("missing target column", dict(json={"data": {"rows": GOOD_ROWS}, "spec": dict(SPEC, target="power_kw")}), 422, "power_kw"),
        ("unknown feature", dict(json={"data": {"rows": GOOD_ROWS}, "spec": dict(SPEC, features=["speed"])}), 422, "speed"),
        ("negative strength", dict(json={"data": {"rows": GOOD_ROWS}, "spec": dict(SPEC, penalty={"strengths": [-1.0]})}), 422, "strength"),
        ("more folds than rows", dict(json={"data": {"rows": GOOD_ROWS[:4]}, "spec": dict(SPEC, cv={"folds": 5})}), 422, "folds"),
        ("grid over budget", dict(json={"data": {"rows": GOOD_ROWS}, "spec": dict(SPEC, penalty={"strengths": {"min": 1e-3, "max": 1e3, "count": 5000}})}), 422, "max_grid_fits"),
        ("ragged CSV", dict(json={"data": {"csv": "flow_lps,energy_kwh\n1,2\n3\n"}, "spec": SPEC}), 422, "Expected 2 columns"),
        ("source absolute", dict(json={"data": {"source": "/etc/passwd"}, "spec": SPEC}), 422, "absolute"),
        ("source dot-dot", dict(json={"data": {"source": "../outside.csv"}, "spec": SPEC}), 422, "'..'"),
        ("source symlink escape", dict(json={"data": {"source": "drop/escape.csv"}, "spec": SPEC}), 422, "outside the data folder"),
        ("source NUL byte", dict(json={"data": {"source": "drop/june.csv\u0000"}, "spec": SPEC}), 422, "NUL"),
        ("source missing", dict(json={"data": {"source": "drop/july.csv"}, "spec": SPEC}), 422, "not a file"),
        ("no spec and no live version", dict(json={"data": {"rows": GOOD_ROWS}}), 422, "no live version"),
        ("too many training rows", dict(json={"data": {"rows": [GOOD_ROWS[0]] * 2001}, "spec": SPEC}), 413, "max_training_rows"),
        ("body too large", dict(content=b'{"data": {"csv": "' + b"1," * BODY_LIMIT + b'"}}', headers=J), 413, "max_body_bytes"),
        ("wrong content type", dict(content=b"flow_lps\n1\n", headers={"content-type": "text/plain"}), 415, "text/plain"),
        ("bad idempotency key", dict(json={"data": {"rows": GOOD_ROWS}, "spec": SPEC}, headers={"Idempotency-Key": "has space"}), 422, "Idempotency-Key"),
        ("multipart without file", dict(files={"spec": (None, '{"target": "energy_kwh"}')}), 422, "'file'"),
        ("multipart bad spec JSON", dict(files={"file": ("d.csv", b"flow_lps,energy_kwh\n1,2\n"), "spec": (None, "{target")}), 400, "spec"),
    ]


@pytest.mark.parametrize("label,kwargs,status,needle", training_cases(), ids=[c[0] for c in training_cases()])
def test_bad_training_submission(plain, label, kwargs, status, needle):
    base, store, settings = plain
    before = snapshot(store, settings)
    r = httpx.post(f"{base}/v1/models/pump-new/trainings", timeout=30, **kwargs)
    body = problem(r, status)
    assert needle.lower() in str(body).lower(), body  # in the detail, the errors or the 'limit' member
    assert snapshot(store, settings) == before  # nothing stored: no job, no staged file, no model


@pytest.mark.parametrize("name", ["Pump", "pump name", "-pump", "p" * 64, "pump%2Fx", "catalog.db"])
def test_bad_model_name(plain, name):
    base, store, settings = plain
    before = snapshot(store, settings)
    r = httpx.post(f"{base}/v1/models/{name}/trainings", json={"data": {"rows": GOOD_ROWS}, "spec": SPEC})
    assert r.status_code in (404, 422), r.text  # an encoded slash cannot reach a route at all
    assert r.headers["content-type"] == "application/problem+json"
    if r.status_code == 422:
        assert r.json()["type"] == "/problems/invalid-name"
    assert snapshot(store, settings) == before


def predict_cases():
    row = {"flow_lps": 50.0, "head_m": 30.0}
    J = {"content-type": "application/json"}
    return [
        ("malformed JSON", "pump-b", dict(content=b'{"rows": [', headers=J), 400, "not valid JSON"),
        ("NaN", "pump-b", dict(content=b'{"rows": [{"flow_lps": NaN, "head_m": 1}]}', headers=J), 400, "NaN"),
        ("wrong type", "pump-b", dict(json={"rows": [dict(row, head_m="deep")]}), 422, "head_m"),
        ("boolean", "pump-b", dict(json={"rows": [dict(row, head_m=True)]}), 422, "head_m"),
        ("missing column", "pump-b", dict(json={"rows": [{"flow_lps": 50.0}]}), 422, "head_m"),
        ("extra column", "pump-b", dict(json={"rows": [dict(row, colour=1.0)]}), 422, "colour"),
        ("unknown field", "pump-b", dict(json={"rows": [row], "level": 0.9}), 422, "level"),
        ("rows not a list", "pump-b", dict(json={"rows": row}), 422, "list"),
        ("interval out of range", "pump-b", dict(json={"rows": [row], "interval_level": 1.5}), 422, "interval_level"),
        ("interval as string", "pump-b", dict(json={"rows": [row], "interval_level": "0.9"}), 422, "interval_level"),
        ("interval, the old name, in the body", "pump-b", dict(json={"rows": [row], "interval": 0.9}), 422,
         "'interval' is now called 'interval_level'"),
        ("interval, the old name, in the query", "pump-b", dict(content="flow_lps,head_m\n1,2\n", params={"interval": "0.9"},
                                                            headers={"content-type": "text/csv"}), 422,
         "'interval' is now called 'interval_level'"),
        ("too many rows", "pump-b", dict(json={"rows": [row] * (ROWS_LIMIT + 1)}), 413, "max_rows_per_request"),
        ("too many CSV rows", "pump-b", dict(content="flow_lps,head_m\n" + "1,2\n" * (ROWS_LIMIT + 1), headers={"content-type": "text/csv"}), 413, "max_rows_per_request"),
        ("CSV missing value", "pump-b", dict(content="flow_lps,head_m\n1,\n", headers={"content-type": "text/csv"}), 422, "missing"),
        ("unknown model", "pump-zzz", dict(json={"rows": [row]}), 404, "pump-zzz"),
        ("bad name", "Pump B", dict(json={"rows": [row]}), 422, "not allowed"),
        ("wrong content type", "pump-b", dict(content=b"x", headers={"content-type": "application/xml"}), 415, "xml"),
    ]


@pytest.mark.parametrize("label,name,kwargs,status,needle", predict_cases(), ids=[c[0] for c in predict_cases()])
def test_bad_predict(plain, label, name, kwargs, status, needle):
    base, store, settings = plain
    r = httpx.post(f"{base}/v1/models/{name}/predictions", **kwargs)
    body = problem(r, status)
    assert needle.lower() in (body["detail"] + str(body.get("errors", ""))).lower(), body


def test_unknown_version_and_job(plain):
    base, _, _ = plain
    for method, path in [("POST", "/v1/models/pump-b/versions/9/predictions"), ("GET", "/v1/models/pump-b/versions/9"),
                         ("GET", "/v1/models/pump-b/versions/9/cv"), ("GET", "/v1/trainings/" + "f" * 32),
                         ("DELETE", "/v1/trainings/" + "f" * 32), ("GET", "/v1/models/nobody/history")]:
        kw = {"json": {"rows": [{"flow_lps": 1.0, "head_m": 1.0}]}} if method == "POST" else {}
        problem(httpx.request(method, f"{base}{path}", **kw), 404)
    body = problem(httpx.get(f"{base}/v1/models/pump-b/versions/zero"), 422)
    assert body["errors"][0]["field"] == "path.version"
    problem(httpx.put(f"{base}/v1/models/pump-b/live", json={"version": 7, "reason": "x"}), 404)
    problem(httpx.put(f"{base}/v1/models/pump-b/live", json={"version": 1}), 422)
    problem(httpx.delete(f"{base}/v1/models/pump-b/versions/1"), 409)  # live: refused


def test_valid_uploads_are_accepted_and_cancellable(plain):
    """The counterpart of the refusals: a good multipart upload and a good source are accepted (202), and a
    queued job (no worker runs here) can be cancelled, which removes its staged data."""
    base, store, settings = plain
    csv = "flow_lps,head_m,energy_kwh\n" + "\n".join(f"{r['flow_lps']},{r['head_m']},{r['energy_kwh']}" for r in GOOD_ROWS)
    import json

    up = httpx.post(f"{base}/v1/models/pump-up/trainings",
                    files={"file": ("june.csv", csv.encode()), "spec": (None, json.dumps(SPEC)), "promote": (None, "never")})
    assert up.status_code == 202, up.text
    assert up.json()["data"]["kind"] == "upload" and up.json()["data"]["rows"] == len(GOOD_ROWS)
    src = httpx.post(f"{base}/v1/models/pump-up/trainings", json={"data": {"source": "drop/june.csv"}, "spec": SPEC})
    assert src.status_code == 202, src.text
    assert src.json()["data"] == {"kind": "source", "source": "drop/june.csv", "rows": 40,
                                  "columns": ["flow_lps", "head_m", "energy_kwh"], "sha256": src.json()["data"]["sha256"]}
    for job in (up.json(), src.json()):
        assert (store.jobs.folder / job["id"]).is_dir()
        r = httpx.delete(f"{base}/v1/trainings/{job['id']}")
        assert r.status_code == 200 and r.json()["state"] == "cancelled"
        assert not (store.jobs.folder / job["id"]).exists()
