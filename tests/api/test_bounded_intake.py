"""Large training bodies never hold the event loop, and uploads are never held in memory whole.

The checks are about where work happens, not how long it takes: a JSON body above
``OFF_LOOP_BYTES`` is parsed and validated in a worker thread (no running event loop there), and a
multipart upload is copied to the store's incoming folder in chunks and read by pyarrow from the file,
never with ``UploadFile.read()``.
"""

from __future__ import annotations

import asyncio
import io

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
