"""Large prediction bodies answered in a separate, lower-priority process (``service.api.predict_lane``).

The reference for every number is the engine itself, called in the test process on the version the store
holds (``FittedModel.predict_detail``): the answer parsed by Python's standard ``json``/``csv`` readers must
equal it exactly (floats are written as shortest round-trip text, so they parse back to the same float;
common practice). The lane's processes must run at a lower CPU priority than the API process (read with
``os.getpriority``), and a killed one must cost one retryable 429, not the server.
"""

from __future__ import annotations

import asyncio
import csv
import io
import json
import os
import signal

import httpx
import numpy as np
import pytest

from service.api.predict_lane import QUEUED_PER_PROCESS, PredictLane
from service.api.server import build
from service.client import Client
from service.errors import Busy

LANE_BYTES = 4096  # bodies above this go to the prediction process in these tests


def station_table(n: int, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    flow = rng.uniform(5.0, 120.0, n)
    head = rng.uniform(10.0, 60.0, n)
    station = rng.choice(["mill-lane", "north-weir", "quarry"], n)
    energy = 3.0 + 0.5 * flow + 0.02 * flow * head + (station == "quarry") * 4.0 + rng.normal(0.0, 2.0, n)
    return {"flow_lps": flow, "head_m": head, "station": station, "energy_kwh": energy}


@pytest.fixture(scope="module")
def lane_service(tmp_path_factory, kit, serve):
    root = tmp_path_factory.mktemp("lane")
    settings = kit.make_settings(root, predict_process_bytes=LANE_BYTES, predict_processes=1)
    app, store, worker = build(settings, embedded_worker=True)
    worker.start()
    try:
        with serve(app) as base:
            tk = Client(base)
            t = station_table(800, seed=3)
            rows = [dict(zip(t, vals)) for vals in zip(*(np.asarray(v).tolist() for v in t.values()))]
            spec = {**kit.SPEC, "categorical": ["station"]}
            job = tk.wait(tk.train("lane-pumps", rows=rows, spec=spec, promote="always"), timeout=300)
            assert job["state"] == "succeeded", job
            yield base, app, store
    finally:
        worker.stop()
        store.close()


def query(n: int, seed: int) -> dict:
    t = station_table(n, seed)
    q = {k: t[k] for k in ("flow_lps", "head_m", "station")}
    q["flow_lps"][5] = 400.0  # far above the training range: a warning on that row
    return q


def as_csv(q: dict) -> bytes:
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow(list(q))
    w.writerows(zip(*(np.asarray(v).tolist() for v in q.values())))
    return out.getvalue().encode()


def lane_pids(app) -> list[int]:
    pool = app.state.predict_lane._pool
    return list(pool._processes) if pool is not None else []


def test_a_large_csv_body_is_answered_by_the_lane_exactly_as_the_engine_computes(lane_service):
    base, app, store = lane_service
    q = query(3000, seed=11)
    body = as_csv(q)
    assert len(body) > LANE_BYTES
    r = httpx.post(f"{base}/v1/models/lane-pumps/predictions?interval_level=0.9", content=body,
                   headers={"content-type": "text/csv"}, timeout=120)
    assert r.status_code == 200, r.text
    assert r.headers["Tikhon-Model"] == "lane-pumps" and r.headers["Tikhon-Model-Version"] == "1"
    pids = lane_pids(app)
    assert len(pids) == 1 and pids[0] != os.getpid()
    assert os.getpriority(os.PRIO_PROCESS, pids[0]) > os.getpriority(os.PRIO_PROCESS, os.getpid())
    want = store.load("lane-pumps", 1).model.predict_detail(q, interval_level=0.9)  # the engine, in this process
    got = list(csv.DictReader(io.StringIO(r.text)))
    assert len(got) == 3000
    assert [float(g["value"]) for g in got] == want["value"].tolist()
    assert [float(g["lower"]) for g in got] == want["lower"].tolist()
    assert [float(g["upper"]) for g in got] == want["upper"].tolist()
    assert [g["warnings"] for g in got] == ["; ".join(w) for w in want["warnings"]]
    assert "flow_lps" in got[5]["warnings"]


def test_a_large_json_body_gets_the_same_json_as_the_api_process_writes(lane_service):
    base, app, store = lane_service
    q = query(400, seed=12)
    rows = [dict(zip(q, vals)) for vals in zip(*(np.asarray(v).tolist() for v in q.values()))]
    big = httpx.post(f"{base}/v1/models/lane-pumps/predictions", json={"rows": rows, "interval_level": 0.8}, timeout=120)
    assert big.status_code == 200, big.text
    assert len(json.dumps({"rows": rows, "interval_level": 0.8})) > LANE_BYTES
    # the same rows in bodies small enough for the API process, joined: the same row objects
    small = []
    for i in range(0, 400, 20):
        r = httpx.post(f"{base}/v1/models/lane-pumps/predictions", json={"rows": rows[i:i + 20], "interval_level": 0.8})
        assert r.status_code == 200
        small += r.json()["predictions"]
    got = big.json()
    assert got["model"]["name"] == "lane-pumps" and got["model"]["version"] == 1
    want = store.load("lane-pumps", 1).model.predict_detail(q, interval_level=0.8)
    assert [p["value"] for p in got["predictions"]] == want["value"].tolist()
    assert [p["interval"] for p in got["predictions"]] == np.column_stack([want["lower"], want["upper"]]).tolist()
    assert [p["warnings"] for p in got["predictions"]] == [p["warnings"] for p in small]
    assert [p["value"] for p in small] == pytest.approx([p["value"] for p in got["predictions"]], rel=1e-12, abs=1e-12)


def test_errors_from_the_lane_are_the_same_problems(lane_service):
    base, app, _ = lane_service
    q = query(2000, seed=13)
    q["station"][1500] = "east-gate"  # a level not seen in training
    url = f"{base}/v1/models/lane-pumps/predictions"
    r = httpx.post(url + "?unseen_levels=refuse", content=as_csv(q), headers={"content-type": "text/csv"}, timeout=120)
    assert r.status_code == 422 and r.headers["content-type"].startswith("application/problem+json")
    assert "east-gate" in r.json()["detail"] and "station" in r.json()["detail"]
    small = {k: v[1500:1502] for k, v in q.items()}
    s = httpx.post(url + "?unseen_levels=refuse", content=as_csv(small), headers={"content-type": "text/csv"})
    assert s.status_code == 422 and s.json()["type"] == r.json()["type"] and s.json()["title"] == r.json()["title"]
    # a malformed body, too large for the API process to read: the reader's 422 from the lane
    bad = as_csv(q).replace(b"\n", b"\nnot-a-number,1,mill-lane\n", 1)
    b = httpx.post(url, content=bad, headers={"content-type": "text/csv"}, timeout=120)
    assert b.status_code == 422 and "flow_lps" in b.json()["detail"], b.text
    u = httpx.post(url, content=b"x" * (LANE_BYTES + 1), headers={"content-type": "text/plain"})
    assert u.status_code == 415


def test_lane_rows_are_counted_by_monitoring(lane_service):
    base, app, _ = lane_service
    before = httpx.get(f"{base}/v1/models/lane-pumps/inputs").json()
    q = query(1500, seed=14)
    r = httpx.post(f"{base}/v1/models/lane-pumps/predictions", content=as_csv(q),
                   headers={"content-type": "text/csv"}, timeout=120)
    assert r.status_code == 200
    report = httpx.get(f"{base}/v1/models/lane-pumps/inputs").json()
    assert report["rows"] == before["rows"] + 1500
    t = station_table(800, seed=3)  # the training rows: rows outside their range counted here, independently
    off = np.zeros(1500, dtype=bool)
    for k in ("flow_lps", "head_m"):
        off |= (q[k] < t[k].min()) | (q[k] > t[k].max())
    assert off[5] and report["outside_range_rows"] == before["outside_range_rows"] + int(off.sum())


def test_a_killed_lane_process_costs_one_retryable_429(lane_service):
    base, app, _ = lane_service
    body = as_csv(query(1000, seed=15))
    url = f"{base}/v1/models/lane-pumps/predictions"
    assert httpx.post(url, content=body, headers={"content-type": "text/csv"}, timeout=120).status_code == 200
    (pid,) = lane_pids(app)
    os.kill(pid, signal.SIGKILL)
    statuses = []
    for _ in range(3):  # the death is seen by the first request after it (or, if the pool noticed first, none)
        r = httpx.post(url, content=body, headers={"content-type": "text/csv"}, timeout=120)
        statuses.append(r.status_code)
        if r.status_code == 429:
            assert r.headers["retry-after"] == "1" and "killed" in r.json()["detail"]
    assert statuses[-1] == 200 and set(statuses) <= {200, 429}
    assert lane_pids(app) and pid not in lane_pids(app)


def test_the_lane_holds_a_bounded_number_of_requests():
    lane = PredictLane(1, 0, cache_models=1, cache_bytes=2**20)
    lane._held = QUEUED_PER_PROCESS  # as many as it holds, waiting or running
    with pytest.raises(Busy) as err:
        asyncio.run(lane.answer(None, b"x", None, {}, False))
    assert err.value.extra.get("retry_after") == 1 and "TIKHON_PREDICT_PROCESSES" in err.value.detail
    assert lane._pool is None  # nothing was started for a refused request
    assert not PredictLane(0, 0, cache_models=1, cache_bytes=1).takes(10**9)
    assert PredictLane(1, 100, cache_models=1, cache_bytes=1).takes(101) and not PredictLane(1, 100, cache_models=1,
                                                                                             cache_bytes=1).takes(100)
