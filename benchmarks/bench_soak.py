"""Soak: sustained prediction load on loopback with a retraining and a live switch in the middle.

A real server (``service.api.server.run``, what ``tikhon serve`` runs, embedded worker on) is started
as a subprocess on 127.0.0.1 over a temporary store holding version 1 of a model trained on the invented
pump-station scenario. Then:

1. **maximum**: closed-loop load (``--concurrency`` requests in flight, the soak's mix of single rows
   and batches) for ``--probe-s`` seconds; the completed requests per second are the measured maximum;
2. **soak**: open-loop load at ``--fraction`` (default 0.7) of that maximum for ``--duration`` seconds:
   requests are scheduled at fixed intervals whatever the answers do, 90% single-row and 10% batches of
   ``--batch-rows`` rows. Latency is counted from each request's scheduled time (so a stalled server
   cannot hide its backlog: "coordinated omission", common practice in load testing since wrk2);
3. at 30% of the soak, a retraining on next month's data is submitted (``promote: never``) and, once it has
   succeeded, version 2 is made live with ``PUT /v1/models/{name}/live``;
4. the server's resident set size is sampled every half second. Warm-up: before the soak, one training
   is submitted and run (``promote: never``), because the server imports the training path's libraries
   and sizes its allocator arenas on first use (a one-time step of about 50 MB here, not growth); then the
   first 20% of the soak. The growth is the median of the last 10% of samples over the median of the
   samples at the end of the warm-up (medians, so one sample taken during a collection does not decide);
5. every response is checked afterwards: status 200, and its numbers equal (to 1e-12, relative) the
   predictions recomputed here, from the stored artifact, by the version its ``model`` block names, and
   differ from the other version's (so the block names the version that produced them).

Only loopback addresses are used; the request count is bounded by rate x duration.

Last line: ``soak_s=<s> rate_rps=<r> requests=<n> errors=<e> p50_ms=<x> p99_ms=<y>
p99_outside_retraining_ms=<z> max_rps=<m> rss_growth=<ratio-1> version_mismatches=<k>``. The p99 outside
the retraining window (submission to two seconds after the live switch) is the steady-state figure; the
overall p99 includes the retraining, which shares the host's cores with the server and the load client.

``run_soak`` is also what ``tests/reliability/test_soak.py`` calls, with its own bounds.
"""

from __future__ import annotations

import argparse
import asyncio
import gc
import json
import os
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import orjson

ROOT = Path(__file__).resolve().parents[1]
NAME = "pumps"
SPEC = {
    "target": "energy_kwh", "features": ["flow_lps", "head_m"],
    "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]}],
    "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e2, "count": 12}},
    "cv": {"scheme": "kfold", "folds": 5, "seed": 3},
}


def demo_columns(n: int, seed: int, month: int = 0) -> dict[str, np.ndarray]:
    sys.path.insert(0, str(ROOT))
    from service.demo import pump_stations

    d = pump_stations(n, seed=seed, month=month)
    return {k: d[k] for k in ("flow_lps", "head_m", "energy_kwh")}


def csv_text(cols: dict[str, np.ndarray]) -> str:
    names = list(cols)
    return "\n".join([",".join(names)] + [",".join(repr(v) for v in vals)
                                          for vals in zip(*(cols[k].tolist() for k in names))]) + "\n"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def rss_bytes(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    raise RuntimeError("no VmRSS")


def prepare_store(root: Path) -> dict[str, str]:
    """Version 1 of the model, live, in a store under ``root``; returns the server's TIKHON_* settings."""
    sys.path.insert(0, str(ROOT))
    from service.engine import tune
    from service.settings import Settings
    from service.store import Store

    (root / "data").mkdir(parents=True, exist_ok=True)
    settings = {"store": str(root / "store"), "data_dir": str(root / "data"), "log_level": "warning",
                "worker_poll_s": "0.1", "worker_heartbeat_s": "0.5", "host": "127.0.0.1"}
    store = Store(Settings(**settings))
    body, arrays = tune(demo_columns(2000, seed=1), SPEC).to_artifact()
    store.publish(NAME, body, arrays)
    store.set_live(NAME, 1, actor="soak", reason="soak set-up")
    store.close()
    return settings


def start_server(settings: dict[str, str], log_path: Path, code: Path = ROOT) -> tuple[subprocess.Popen, str]:
    """``service.api.server.run`` of the checkout ``code`` (this one by default) with ``settings`` as TIKHON_
    variables, on a free loopback port; returns the process and its base URL once ``/healthz`` answers."""
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("TIKHON_")}
    env.update({f"TIKHON_{k.upper()}": v for k, v in settings.items()})
    env["TIKHON_PORT"] = str(port)
    env["PYTHONPATH"] = str(code) + os.pathsep + env.get("PYTHONPATH", "")
    log = open(log_path, "ab")
    proc = subprocess.Popen([sys.executable, "-c", "from service.settings import Settings\n"
                             "from service.api.server import run\nrun(Settings())\n"],
                            env=env, cwd=str(code), stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    base = f"http://127.0.0.1:{port}"
    end = time.monotonic() + 90
    while True:  # start-up wait
        try:
            if httpx.get(f"{base}/healthz", timeout=2).status_code == 200:
                return proc, base
        except httpx.TransportError:
            pass
        if proc.poll() is not None or time.monotonic() > end:
            raise RuntimeError(f"server did not start, see {log_path}")
        time.sleep(0.05)


def _rows(rng: np.random.Generator, n: int) -> list[dict[str, float]]:
    flow = rng.uniform(8.0, 110.0, n).round(3)
    head = rng.uniform(20.0, 55.0, n).round(3)
    return [{"flow_lps": float(f), "head_m": float(h)} for f, h in zip(flow, head)]


async def _max_rps(base: str, seconds: float, concurrency: int, seed: int, batch_rows: int) -> float:
    """Completed requests per second under closed-loop load with the soak's own mix (90% single rows)."""
    rng = np.random.default_rng(seed)
    bodies = [{"rows": _rows(rng, batch_rows if k % 10 == 9 else 1)} for k in range(250)]
    done = 0
    stop = time.perf_counter() + seconds

    async def loop(client: httpx.AsyncClient, k: int) -> None:
        nonlocal done
        i = k
        while time.perf_counter() < stop:
            r = await client.post(f"/v1/models/{NAME}/predictions", json=bodies[i % len(bodies)])
            r.raise_for_status()
            done += 1
            i += concurrency

    start = time.perf_counter()
    async with httpx.AsyncClient(base_url=base, timeout=60,
                                 limits=httpx.Limits(max_connections=concurrency)) as client:
        await asyncio.gather(*(loop(client, k) for k in range(concurrency)))
    return done / (time.perf_counter() - start)


async def _soak(base: str, pid: int, rate: float, duration: float, batch_rows: int, seed: int,
                retrain_csv: str) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    n = int(rate * duration)
    # Each request is kept as its encoded body, and each answer as (version, numpy values): a few objects
    # per request, so the client's own garbage collector does not stall it as hundreds of thousands of
    # answers accumulate (parsed JSON answers kept whole made the client, not the server, fall behind).
    plan = [orjson.dumps({"rows": _rows(rng, batch_rows if rng.random() < 0.1 else 1)}) for _ in range(n)]
    headers = {"content-type": "application/json"}
    results: list[tuple[int, float, Any]] = [None] * n  # type: ignore[list-item]
    gc.collect()
    gc.freeze()  # the plan is permanent for the run: keep it out of the collector's way
    rss: list[tuple[float, int]] = []
    events: dict[str, Any] = {}
    sem = asyncio.Semaphore(8)  # as many as the pool has connections: waiting happens here, in FIFO order, not in the pool
    t0 = time.perf_counter() + 0.5

    async with httpx.AsyncClient(base_url=base, timeout=120,
                                 limits=httpx.Limits(max_connections=8, max_keepalive_connections=8)) as client:

        async def one(i: int) -> None:
            scheduled = t0 + i / rate
            async with sem:
                try:
                    r = await client.post(f"/v1/models/{NAME}/predictions", content=plan[i], headers=headers)
                    elapsed = time.perf_counter() - scheduled
                    if r.status_code == 200:
                        body = orjson.loads(r.content)
                        kept = (body["model"]["version"], np.array([p["value"] for p in body["predictions"]]))
                    else:
                        kept = r.text[:300]
                    results[i] = (r.status_code, elapsed, kept)
                except httpx.HTTPError as exc:
                    results[i] = (0, time.perf_counter() - scheduled, repr(exc))

        async def sampler() -> None:
            while time.perf_counter() < t0 + duration + 1:
                rss.append((time.perf_counter() - t0, rss_bytes(pid)))
                await asyncio.sleep(0.5)

        async def middle() -> None:
            await asyncio.sleep(max(0.0, t0 + 0.3 * duration - time.perf_counter()))
            events["retrain_submitted_s"] = time.perf_counter() - t0
            r = await client.post(f"/v1/models/{NAME}/trainings", json={
                "data": {"csv": retrain_csv}, "spec": SPEC, "promote": "never"})
            r.raise_for_status()
            job_id = r.json()["id"]
            while True:  # poll the job (a wait, not a timed check)
                job = (await client.get(f"/v1/trainings/{job_id}")).json()
                if job["state"] in ("succeeded", "failed", "cancelled"):
                    break
                await asyncio.sleep(0.2)
            events["retrain_state"] = job["state"]
            events["retrain_done_s"] = time.perf_counter() - t0
            if job["state"] == "succeeded":
                r = await client.put(f"/v1/models/{NAME}/live",
                                     json={"version": job["version"], "reason": "soak: live switch under load"})
                events["switch_status"] = r.status_code
                events["switched_to"] = job["version"]
                events["switch_s"] = time.perf_counter() - t0

        side = [asyncio.create_task(sampler()), asyncio.create_task(middle())]
        tasks = []
        for i in range(n):
            delay = t0 + i / rate - time.perf_counter()
            if delay > 0:
                await asyncio.sleep(delay)
            tasks.append(asyncio.create_task(one(i)))
        await asyncio.gather(*tasks)
        await asyncio.gather(*side)
    return {"plan": plan, "results": results, "rss": rss, "events": events}


def _train_once(base: str, csv: str) -> dict[str, Any]:
    """Submit one training (promote: never) and wait for it: the warm-up of the training path."""
    r = httpx.post(f"{base}/v1/models/{NAME}/trainings", json={"data": {"csv": csv}, "spec": SPEC, "promote": "never"},
                   timeout=120)
    r.raise_for_status()
    while True:  # a wait, not a timed check
        job = httpx.get(f"{base}/v1/trainings/{r.json()['id']}", timeout=60).json()
        if job["state"] in ("succeeded", "failed", "cancelled"):
            return job
        time.sleep(0.1)


def _check_versions(store_root: Path, plan, results) -> tuple[int, dict[int, int]]:
    """Recompute every answered request with the version its ``model`` block names, from the stored
    artifact; count the answers whose numbers do not match it, or also match another version."""
    sys.path.insert(0, str(ROOT))
    from service.settings import Settings
    from service.store import Store

    store = Store(Settings(store=store_root))
    try:
        versions = [v["version"] for v in store.list_versions(NAME)]
        models = {v: store.load(NAME, v).model for v in versions}
    finally:
        store.close()
    mismatches = 0
    served: dict[int, int] = {}
    for raw, res in zip(plan, results):
        if res is None or res[0] != 200:
            continue
        v, got = res[2]
        served[v] = served.get(v, 0) + 1
        rows = orjson.loads(raw)["rows"]
        cols = {"flow_lps": np.array([r["flow_lps"] for r in rows]), "head_m": np.array([r["head_m"] for r in rows])}
        want = models[v].predict_detail(cols)["value"]
        ok = np.allclose(got, want, rtol=1e-12, atol=0.0)
        for other, m in models.items():
            if other != v and np.allclose(got, m.predict_detail(cols)["value"], rtol=1e-12, atol=0.0):
                ok = False  # the numbers would also fit another version: the block proves nothing
        mismatches += 0 if ok else 1
    return mismatches, served


def run_soak(root: Path, *, duration: float, probe_s: float = 5.0, fraction: float = 0.7, concurrency: int = 8,
             batch_rows: int = 100, seed: int = 2026) -> dict[str, Any]:
    """Start a server under ``root``, measure its maximum, soak it, and return the figures (see above)."""
    settings = prepare_store(root)
    proc, base = start_server(settings, root / "server.log")
    try:
        asyncio.run(_max_rps(base, 1.0, concurrency, seed, batch_rows))  # warm the pool and the model cache
        max_rps = asyncio.run(_max_rps(base, probe_s, concurrency, seed, batch_rows))
        rate = max(5.0, fraction * max_rps)
        retrain_csv = csv_text(demo_columns(2000, seed=2, month=1))
        warm_job = _train_once(base, csv_text(demo_columns(2000, seed=3, month=1)))  # see step 4 above
        out = asyncio.run(_soak(base, proc.pid, rate, duration, batch_rows, seed, retrain_csv))
        alive = proc.poll() is None
    finally:
        proc.terminate()
        try:
            proc.wait(30)
        except subprocess.TimeoutExpired:
            proc.kill()
    results = out["results"]
    ok = [r for r in results if r is not None and r[0] == 200]
    errors = [r for r in results if r is None or r[0] != 200]
    lat = np.array([r[1] for r in ok]) * 1000 if ok else np.array([np.nan])
    single = np.array([r[1] for r in ok if r[2][1].size == 1]) * 1000 if ok else np.array([np.nan])
    rss = out["rss"]
    warm_end = 0.2 * duration
    at_warm = [b for t, b in rss if warm_end - 2.5 <= t <= warm_end + 2.5] or [rss[0][1]]
    tail = [b for t, b in rss if t >= 0.9 * duration] or [rss[-1][1]]
    growth = float(np.median(tail) / np.median(at_warm) - 1.0)
    mismatches, served = _check_versions(Path(settings["store"]), out["plan"], results)
    ev = out["events"]
    windows: list[list[float]] = [[] for _ in range(int(np.ceil(duration / 10.0)) + 1)]
    for i, r in enumerate(results):
        if r is not None and r[0] == 200:
            windows[int(i / rate // 10)].append(r[1])
    busy = (ev.get("retrain_submitted_s", duration), ev.get("switch_s", ev.get("retrain_done_s", duration)) + 2.0)
    quiet = np.array([r[1] for i, r in enumerate(results)
                      if r is not None and r[0] == 200 and not busy[0] <= i / rate <= busy[1]]) * 1000
    return {
        "duration_s": duration, "max_rps": max_rps, "rate_rps": rate, "requests": len(results),
        "errors": len(errors), "error_samples": [repr(e)[:300] for e in errors[:5]],
        "p50_ms": float(np.percentile(lat, 50)), "p99_ms": float(np.percentile(lat, 99)),
        "p99_single_row_ms": float(np.percentile(single, 99)), "max_ms": float(np.max(lat)),
        "p99_outside_retraining_ms": float(np.percentile(quiet, 99)) if quiet.size else float("nan"),
        "retraining_window_s": [round(busy[0], 2), round(busy[1], 2)],
        "p99_ms_per_10s": [round(float(np.percentile(w, 99)) * 1000, 1) for w in windows if w],
        "share_within_100ms": float(np.mean(lat <= 100.0)),
        "rss_at_warmup_mb": float(np.median(at_warm) / 2**20), "rss_end_mb": float(np.median(tail) / 2**20),
        "rss_growth": growth, "version_mismatches": mismatches, "served_by_version": served,
        "events": out["events"], "server_alive": alive,
        "batch_share": sum(1 for r in ok if r[2][1].size > 1) / max(1, len(ok)),
        "warmup_training": warm_job["state"],
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--duration", type=float, default=300.0, help="soak seconds (default 300)")
    ap.add_argument("--probe-s", type=float, default=10.0, help="seconds of the maximum-throughput probe")
    ap.add_argument("--fraction", type=float, default=0.7, help="share of the measured maximum to hold")
    ap.add_argument("--concurrency", type=int, default=8)
    ap.add_argument("--batch-rows", type=int, default=100)
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="tikhon-soak-") as tmp:
        fig = run_soak(Path(tmp), duration=args.duration, probe_s=args.probe_s, fraction=args.fraction,
                       concurrency=args.concurrency, batch_rows=args.batch_rows)
    print(json.dumps(fig, indent=2, default=str))
    print(f"soak_s={fig['duration_s']:g} rate_rps={fig['rate_rps']:.1f} requests={fig['requests']} "
          f"errors={fig['errors']} p50_ms={fig['p50_ms']:.2f} p99_ms={fig['p99_ms']:.2f} "
          f"p99_outside_retraining_ms={fig['p99_outside_retraining_ms']:.2f} max_rps={fig['max_rps']:.1f} "
          f"rss_growth={fig['rss_growth']:+.4f} version_mismatches={fig['version_mismatches']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
