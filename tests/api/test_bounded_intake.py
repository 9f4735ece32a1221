"""Large training bodies never hold the event loop, and uploads are never held in memory whole.

The checks are about where work happens, not how long it takes: a JSON body above
``OFF_LOOP_BYTES`` is parsed and validated in a worker thread (no running event loop there), and a
multipart upload is copied to the store's incoming folder in chunks and read by pyarrow from the file,
never with ``UploadFile.read()``.
"""

from __future__ import annotations

import asyncio
import io
import json

import httpx
import pytest

SPEC = {"target": "energy_kwh", "features": ["flow_lps", "head_m"], "bases": [{"kind": "linear"}],
        "penalty": {"kind": "l2", "strengths": [0.1, 1.0]}, "cv": {"folds": 3}}


def _on_loop() -> bool:
    try:
        asyncio.get_running_loop()
        return True
    except RuntimeError:
        return False


@pytest.fixture(scope="module")
def svc(tmp_path_factory, kit):
    with kit.service(tmp_path_factory.mktemp("intake"), worker=False) as s:
        yield s


def test_a_large_json_training_body_is_parsed_off_the_event_loop(svc, kit, monkeypatch):
    from service.api.routes import trainings

    seen: list[bool] = []
    real = trainings.parse_training_request
    monkeypatch.setattr(trainings, "parse_training_request", lambda raw: (seen.append(_on_loop()), real(raw))[1])
    base, _, _ = svc
    rows = kit.as_rows(kit.pump_table(4_000, seed=1))  # about 300 KB of JSON
    small = kit.as_rows(kit.pump_table(20, seed=2))
    assert httpx.post(f"{base}/v1/models/big-body/trainings", json={"data": {"rows": rows}, "spec": SPEC},
                      timeout=120).status_code == 202
    assert httpx.post(f"{base}/v1/models/big-body/trainings", json={"data": {"rows": small}, "spec": SPEC},
                      timeout=120).status_code == 202
    assert seen == [False, True]  # the large body in a worker thread; a small one inline (cheaper)


def test_an_upload_is_streamed_to_disk_and_read_from_the_file(svc, kit, monkeypatch):
    from starlette.datastructures import UploadFile

    async def refuse(self, size=-1):
        raise AssertionError("the upload was read into memory whole")

    monkeypatch.setattr(UploadFile, "read", refuse)
    base, store, _ = svc
    table = kit.pump_table(3_000, seed=3)
    names = ["flow_lps", "head_m", "energy_kwh"]
    csv = ",".join(names) + "\n" + "".join(",".join(repr(float(table[c][i])) for c in names) + "\n"
                                           for i in range(3_000))
    r = httpx.post(f"{base}/v1/models/uploaded/trainings", files={"file": ("june.csv", io.BytesIO(csv.encode()))},
                   data={"spec": __import__("json").dumps(SPEC)}, timeout=120)
    assert r.status_code == 202, r.text
    assert r.json()["data"]["rows"] == 3_000 and r.json()["data"]["filename"] == "june.csv"
    assert list(store.jobs.incoming_dir.iterdir()) == []  # the saved upload went with the job or was removed


# ---- large JSON bodies are read in an intake process ---------------------------------------------------
# A JSON body above ``intake_process_bytes`` is parsed, turned into columns, validated and staged in a
# separate process: the API process never builds its row objects (which would hold its interpreter lock).
# The checks spy on ``tables.from_rows`` in this (the API) process: it must not run for those bodies, and
# the answers must be the same problem details as when the body is read in the API process.

def _spy_rows(monkeypatch) -> list[int]:
    from service import tables

    calls: list[int] = []
    real = tables.from_rows
    monkeypatch.setattr(tables, "from_rows", lambda rows, **kw: (calls.append(len(rows)), real(rows, **kw))[1])
    return calls


@pytest.fixture(scope="module")
def pair(tmp_path_factory, kit):
    """Two servers over their own stores: one reads every JSON training body in an intake process
    (``intake_process_bytes=0``), the other every body in its own process."""
    with kit.service(tmp_path_factory.mktemp("by-process"), worker=False, intake_process_bytes=0) as far, \
            kit.service(tmp_path_factory.mktemp("in-process"), worker=False, intake_process_bytes=2**40) as near:
        yield far, near


def test_a_large_json_body_is_read_staged_and_checked_in_an_intake_process(pair, kit, monkeypatch):
    import numpy as np

    from service import tables
    from service.api import intake

    (base, store, settings), _ = pair
    table = kit.pump_table(4_000, seed=4)
    rows = kit.as_rows(table)
    expected = tables.from_rows(rows, where="data.rows")
    spec, counts = intake.validate(expected, SPEC, settings)
    calls = _spy_rows(monkeypatch)
    r = httpx.post(f"{base}/v1/models/far/trainings", json={"data": {"rows": rows}, "spec": SPEC}, timeout=120)
    assert r.status_code == 202, r.text
    assert calls == []  # no row object was turned into columns in the API process
    job = r.json()
    assert job["data"] == {"kind": "rows", "rows": 4_000, "columns": ["flow_lps", "head_m", "energy_kwh"],
                           "sha256": intake.table_sha256(expected)}
    assert job["grid"] == counts and job["grid"]["fits"] == 2 * 3  # 2 strengths x 3 folds, the same budget check
    assert store.jobs.get(job["id"])["request"]["spec"] == spec
    staged = tables.read_staged(store.jobs.get(job["id"])["data_path"])
    assert list(staged) == list(expected)
    for name in expected:  # the staged columns are the rows' values, bit for bit
        assert np.array_equal(staged[name], expected[name])
    assert list(store.jobs.incoming_dir.iterdir()) == []

    # the same body sent without a length (chunked transfer): read in memory, parsed in the intake process
    raw = json.dumps({"data": {"rows": rows}, "spec": SPEC}).encode()
    chunked = httpx.post(f"{base}/v1/models/far-chunked/trainings", timeout=120,
                         content=iter([raw[i:i + 65_536] for i in range(0, len(raw), 65_536)]),
                         headers={"content-type": "application/json"})
    assert chunked.status_code == 202, chunked.text
    assert calls == [] and chunked.json()["data"] == job["data"]
    assert list(store.jobs.incoming_dir.iterdir()) == []


def _without_ids(problem: dict) -> dict:
    return {k: v for k, v in problem.items() if k not in ("instance", "trace_id", "request_id")}


BAD_BODIES = {
    "not JSON": b'{"data": {"rows": [{"flow_lps": 1,',
    "unknown promote": {"data": {"rows": [{"flow_lps": 1.0, "energy_kwh": 2.0}] * 3}, "spec": SPEC, "promote": "maybe"},
    "spec string too long": {"data": {"rows": [{"flow_lps": 1.0, "energy_kwh": 2.0}] * 3},
                             "spec": {**SPEC, "units": {"energy_kwh": "k" * 5_000}}},
    "ragged row": {"data": {"rows": [{"flow_lps": 1.0 + i, "head_m": 2.0, "energy_kwh": 3.0} for i in range(50)]
                            + [{"flow_lps": 1.0, "energy_kwh": 3.0}]}, "spec": SPEC},
    "mixed column": {"data": {"rows": [{"flow_lps": 1.0 + i, "head_m": "high" if i == 7 else 2.0, "energy_kwh": 3.0}
                                       for i in range(50)]}, "spec": SPEC},
    "unknown feature": {"data": {"rows": [{"flow": 1.0 + i, "head_m": 2.0 * i, "energy_kwh": 3.0 + i}
                                          for i in range(50)]}, "spec": SPEC},
    "too many levels": {"data": {"rows": [{"site": f"s{i}", "flow_lps": 1.0 + i, "head_m": 2.0 * i,
                                           "energy_kwh": 3.0 + i % 7} for i in range(1_200)]},
                        "spec": {**SPEC, "categorical": ["site"]}},
    # no spec, no live version: the missing live spec is answered before the data's own error (a ragged row)
    "no spec and ragged rows": {"data": {"rows": [{"flow_lps": 1.0, "energy_kwh": 3.0}, {"flow_lps": 2.0}]}},
}


@pytest.mark.parametrize("case", sorted(BAD_BODIES))
def test_refusals_from_the_intake_process_are_the_in_process_problems(pair, case, monkeypatch):
    (far, far_store, _), (near, _, _) = pair
    body = BAD_BODIES[case]
    kw = {"content": body, "headers": {"content-type": "application/json"}} if isinstance(body, bytes) else {"json": body}
    calls = _spy_rows(monkeypatch)
    a = httpx.post(f"{far}/v1/models/bad/trainings", timeout=120, **kw)
    assert calls == []  # the intake process read it
    b = httpx.post(f"{near}/v1/models/bad/trainings", timeout=120, **kw)
    assert a.status_code == b.status_code and a.status_code in (400, 413, 422), (a.text, b.text)
    assert a.headers["content-type"] == b.headers["content-type"] == "application/problem+json"
    assert _without_ids(a.json()) == _without_ids(b.json())
    if case == "no spec and ragged rows":
        assert a.json()["type"].endswith("invalid-spec") and "no live version" in a.json()["detail"]
    assert list(far_store.jobs.incoming_dir.iterdir()) == []  # nothing staged stays behind
    assert far_store.jobs.list(name="bad") == []


def test_an_intake_process_that_dies_is_a_429_and_is_replaced(tmp_path, kit):
    import os
    import signal

    from service.api.intake_process import IntakePool
    from service.errors import Busy

    settings = kit.make_settings(tmp_path)
    incoming = tmp_path / "incoming"
    incoming.mkdir()
    body = json.dumps({"data": {"source": "june.csv"}, "spec": SPEC}).encode()
    pool = IntakePool(1)

    async def scenario():
        first = await pool.read_json(body, settings, incoming)  # starts the process
        assert first["data"] == {"source": "june.csv"} and first["request"]["spec"] == SPEC
        for pid in list(pool._executor()._processes):  # killed (the OOM killer, an operator)
            os.kill(pid, signal.SIGKILL)
        with pytest.raises(Busy) as err:
            for _ in range(50):  # the pool notices the death at the next submission or while it waits
                await pool.read_json(body, settings, incoming)
                await asyncio.sleep(0.1)
        assert err.value.extra == {"retry_after": 1} and "Submit again" in err.value.detail
        again = await pool.read_json(body, settings, incoming)  # a fresh process reads the next body
        assert again == first

    try:
        asyncio.run(scenario())
    finally:
        pool.close()
    assert list(incoming.iterdir()) == []


def test_a_retrain_without_a_spec_is_checked_against_the_live_spec_in_the_intake_process(pair, kit, monkeypatch):
    """A body without a spec reuses the live version's spec, known only after the body was read: the staged
    table is checked against it in the intake process (the API process never reads the table back), with the
    same answers as when the body is read in the API process."""
    from service import tables
    from service.engine import tune

    body, arrays = tune(kit.pump_table(200, seed=9), SPEC).to_artifact()
    (far, far_store, _), (near, near_store, _) = pair
    for store in (far_store, near_store):
        store.set_live("reuse", store.publish("reuse", body, arrays)["version"], actor="test", reason="fixture")
    read_back: list[str] = []
    real = tables.read_staged
    monkeypatch.setattr(tables, "read_staged", lambda path: (read_back.append(str(path)), real(path))[1])
    good = kit.as_rows(kit.pump_table(4_000, seed=10))
    a = httpx.post(f"{far}/v1/models/reuse/trainings", json={"data": {"rows": good}}, timeout=120)
    b = httpx.post(f"{near}/v1/models/reuse/trainings", json={"data": {"rows": good}}, timeout=120)
    assert a.status_code == b.status_code == 202, (a.text, b.text)
    assert read_back == []  # far: checked in the intake process; near: read in the API process, never staged back
    assert far_store.jobs.get(a.json()["id"])["request"]["spec"] == near_store.jobs.get(b.json()["id"])["request"]["spec"]
    assert a.json()["grid"] == b.json()["grid"] and a.json()["data"] == b.json()["data"]
    lacking = [{"flow_lps": r["flow_lps"], "energy_kwh": r["energy_kwh"]} for r in good]  # no head_m (a feature)
    a = httpx.post(f"{far}/v1/models/reuse/trainings", json={"data": {"rows": lacking}}, timeout=120)
    b = httpx.post(f"{near}/v1/models/reuse/trainings", json={"data": {"rows": lacking}}, timeout=120)
    assert a.status_code == b.status_code == 422, (a.text, b.text)
    assert "head_m" in a.json()["detail"] and _without_ids(a.json()) == _without_ids(b.json())
    assert list(far_store.jobs.incoming_dir.iterdir()) == []  # the refused table's staged file was removed
