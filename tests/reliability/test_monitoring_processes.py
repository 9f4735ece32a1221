"""Monitoring counts across real server processes: two processes on one catalog add up, and a restart loses
at most the counts of one flush interval (none at a graceful stop).

The counts are checked against the number of rows this test sent, and the bin counts against bins
computed here from the version's stored edges (common practice: a row counts once, in one bin).
"""

from __future__ import annotations

import time

import httpx
import numpy as np
import pytest

import livesvc  # tests/livesvc.py


def _send(base: str, rows: list[dict], single: int) -> None:
    """``single`` rows one request each (the queued hot path), the rest as one batch."""
    for row in rows[:single]:
        r = httpx.post(f"{base}/v1/models/pumps/predictions", json={"rows": [row]}, timeout=30)
        assert r.status_code == 200, r.text
    if rows[single:]:
        r = httpx.post(f"{base}/v1/models/pumps/predictions", json={"rows": rows[single:]}, timeout=60)
        assert r.status_code == 200, r.text


def _expected_bins(store, rows: list[dict]) -> list[float]:
    ref = store.get_manifest("pumps", 1, cv_table=False)["training"]["drift_reference"]
    edges = np.array(next(e for e in ref["numeric"] if e["name"] == "flow_lps")["edges"])
    x = np.array([r["flow_lps"] for r in rows])
    counts = np.zeros(edges.size + 1)
    for v in x:  # one row at a time, by the bin definition: below, [eᵢ₋₁, eᵢ) (the last bin closed), above
        if v < edges[0]:
            counts[0] += 1
        elif v > edges[-1]:
            counts[-1] += 1
        else:
            counts[min(int(np.searchsorted(edges, v, side="right")), edges.size - 1)] += 1
    return counts.tolist()


@pytest.mark.parametrize("catalog", ["sqlite", "postgresql"])
def test_two_server_processes_on_one_catalog_add_up(rk, tmp_path, catalog, request):
    over = {"monitor_flush_s": 0.3}
    if catalog == "postgresql":
        over["database_url"] = request.getfixturevalue("postgres_catalog_url")
    settings = rk.base_settings(tmp_path, **over)
    with rk.open_store(settings) as store:
        rk.publish_demo(store)
    rows = rk.as_rows({k: v for k, v in rk.demo_rows(500, seed=8).items() if k in ("flow_lps", "head_m")})
    with rk.server_process(tmp_path, **over) as a, rk.server_process(tmp_path, **over) as b:
        _send(a.base, rows[:200], single=30)
        _send(b.base, rows[200:], single=30)
        # B writes its counts within one flush interval; A reads the catalog (a readiness wait on B's flush)
        report = livesvc.wait_for(lambda: (lambda r: r if r["rows"] == 500 else None)(
            httpx.get(f"{a.base}/v1/models/pumps/inputs").json()), "both processes' counts in the catalog", 60)
        from_b = httpx.get(f"{b.base}/v1/models/pumps/inputs").json()
    flow = next(f for f in report["features"] if f["name"] == "flow_lps")
    with rk.open_store(settings) as store:
        expected = _expected_bins(store, rows)
    assert [round(s * 500) for s in flow["recent"]] == expected
    assert from_b["rows"] == 500 and from_b["features"] == report["features"]


def test_a_restart_loses_at_most_one_flush_interval(rk, tmp_path):
    flush = 0.5
    settings = rk.base_settings(tmp_path, monitor_flush_s=flush)
    with rk.open_store(settings) as store:
        rk.publish_demo(store)
    rows = rk.as_rows({k: v for k, v in rk.demo_rows(300, seed=9).items() if k in ("flow_lps", "head_m")})
    srv = rk.ServerProcess(settings, tmp_path / "first.log").wait_ready()
    try:
        _send(srv.base, rows[:100], single=20)
        time.sleep(3 * flush)  # more than one flush interval passes before the kill
        _send(srv.base, rows[100:110], single=10)  # sent within the last interval: these may be lost
        srv.kill()
    finally:
        srv.stop()
    with rk.server_process(tmp_path, monitor_flush_s=flush) as second:
        after_kill = httpx.get(f"{second.base}/v1/models/pumps/inputs").json()["rows"]
        assert 100 <= after_kill <= 110, after_kill
        _send(second.base, rows[110:], single=15)
    # a graceful stop (SIGTERM) writes the last counts at shutdown: nothing is lost
    with rk.server_process(tmp_path, monitor_flush_s=flush) as third:
        assert httpx.get(f"{third.base}/v1/models/pumps/inputs").json()["rows"] == after_kill + 190
