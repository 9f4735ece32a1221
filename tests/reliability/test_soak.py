"""Sustained load: a bounded soak on loopback at 70% of the measured maximum, with a retraining and a
live switch in the middle (the procedure and its figures: ``benchmarks/bench_soak.py``, run here through
its ``run_soak``).

Asserted: zero errors (every request answered 200), the server alive at the end, the retraining
succeeded and the switch answered 200, both versions served, every response's ``model`` block names the
version whose stored artifact reproduces its numbers (and no other version does), and the server's RSS
grew by less than 10% from the end of the warm-up to the end. Reported, not asserted (machines are
shared and noisy): the request rate, p50 and p99 latency. The full soak lasts 5 minutes
(``TIKHON_CI_FULL=1`` or ``-m slow``); the README's test command runs 30 seconds.
"""

from __future__ import annotations

import importlib.util
import json

import pytest

pytestmark = pytest.mark.slow


def _bench(rk):
    spec = importlib.util.spec_from_file_location("tikhon_bench_soak", rk.REPO / "benchmarks" / "bench_soak.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


def test_soak_at_a_fixed_rate_with_a_retraining_and_a_live_switch(tmp_path, rk, full):
    fig = _bench(rk).run_soak(tmp_path, duration=300.0 if full else 30.0, probe_s=10.0 if full else 4.0)
    print("\nsoak figures: " + json.dumps({k: v for k, v in fig.items() if k != "error_samples"}, default=str))
    assert fig["requests"] >= 100
    assert fig["errors"] == 0, fig["error_samples"]
    assert fig["server_alive"]
    assert fig["warmup_training"] == "succeeded"
    ev = fig["events"]
    assert ev.get("retrain_state") == "succeeded" and ev.get("switch_status") == 200, ev
    assert set(fig["served_by_version"]) == {1, ev["switched_to"]}, fig["served_by_version"]
    assert fig["version_mismatches"] == 0
    assert fig["rss_growth"] < 0.10, (fig["rss_at_warmup_mb"], fig["rss_end_mb"])
