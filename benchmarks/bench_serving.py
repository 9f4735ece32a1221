"""Serving overhead: single-row predictions against a bare constant-JSON endpoint, and a CSV batch.

Two uvicorn servers are started as subprocesses with identical server settings (one process, asyncio
loop, h11, no access log, log level warning):

* ``bare``: a FastAPI app with one POST route that ignores the body and returns a constant JSON object;
* ``ours``: the Tikhon app (``create_app``) over a store in a temporary folder holding one model of the
  invented pump-station scenario (polynomial basis, tuned by ``service.engine.tune``), no API key,
  embedded worker off.

Both get the same bounded load from one httpx async client on loopback: ``--concurrency`` requests in
flight, ``--requests`` requests per round, the same JSON body (one row). Rounds alternate bare/ours,
and the best round of each is kept (the least disturbed by other work on a shared machine). Then a
10,000-row CSV batch is sent to ours ``--batches`` times; the median gives rows per second.

Last line: ``predict_rps_ratio=<ours/bare> p99_ms=<ours, single row> batch_rows_per_s=<y>``.
"""

from __future__ import annotations

import argparse
import asyncio
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
SERVER_OPTS = dict(loop="asyncio", http="h11", workers=None, access_log=False, log_level="warning", server_header=False)


def pump_table(n: int, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    flow = rng.uniform(5.0, 120.0, n)
    head = rng.uniform(10.0, 60.0, n)
    energy = 3.0 + 0.5 * flow + 0.02 * flow * head - 0.004 * flow**2 + rng.normal(0.0, 2.0, n)
    return {"flow_lps": flow, "head_m": head, "energy_kwh": energy}


# ----------------------------------------------------------------------------------------------------
# server side (run in subprocesses)


def serve_bare(port: int) -> None:
    import uvicorn
    from fastapi import FastAPI
    from fastapi.responses import Response

    app = FastAPI()
    constant = b'{"status":"ok","value":1.0}'

    @app.post("/bare")
    async def bare():
        return Response(constant, media_type="application/json")

    uvicorn.run(app, host="127.0.0.1", port=port, **{k: v for k, v in SERVER_OPTS.items() if v is not None})


def serve_ours(port: int, store_dir: str) -> None:
    import uvicorn

    from service.api.app import create_app
    from service.api.logs import configure
    from service.engine import tune
    from service.settings import Settings
    from service.store import Store

    settings = Settings(store=store_dir, data_dir=store_dir, embedded_worker=False, log_level="warning",
                        max_rows_per_request=100_000)
    configure(settings.log_level)
    store = Store(settings)
    if store.live_version("pumps") is None:
        spec = {"target": "energy_kwh", "bases": [{"kind": "polynomial", "degrees": [1, 2, 3]}],
                "penalty": {"kind": "l2", "strengths": {"min": 1e-4, "max": 1e2, "count": 20}}}
        body, arrays = tune(pump_table(2000, seed=1), spec).to_artifact()
        store.publish("pumps", body, arrays)
        store.set_live("pumps", 1, actor="benchmark", reason="benchmark model")
    app = create_app(settings, store)
    uvicorn.run(app, host="127.0.0.1", port=port, **{k: v for k, v in SERVER_OPTS.items() if v is not None})


# ----------------------------------------------------------------------------------------------------
# client side


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start(kind: str, port: int, store_dir: str) -> subprocess.Popen:
    args = [sys.executable, __file__, "--serve", kind, "--port", str(port), "--store", store_dir]
    proc = subprocess.Popen(args, cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)})
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"http://127.0.0.1:{port}/openapi.json", timeout=1).status_code == 200:
                return proc
        except httpx.HTTPError:
            pass
        if proc.poll() is not None:
            raise SystemExit(f"{kind} server exited with {proc.returncode}")
        time.sleep(0.1)
    proc.kill()
    raise SystemExit(f"{kind} server did not start")


async def load(url: str, body: bytes, n: int, concurrency: int) -> tuple[float, list[float]]:
    """``n`` POSTs with at most ``concurrency`` in flight; returns (requests per second, latencies in s)."""
    latencies: list[float] = []
    headers = {"content-type": "application/json"}
    limits = httpx.Limits(max_connections=concurrency, max_keepalive_connections=concurrency)
    async with httpx.AsyncClient(limits=limits, timeout=30) as client:
        queue = iter(range(n))

        async def runner() -> None:
            for _ in queue:
                t0 = time.perf_counter()
                r = await client.post(url, content=body, headers=headers)
                latencies.append(time.perf_counter() - t0)
                if r.status_code != 200:
                    raise SystemExit(f"{url} answered {r.status_code}: {r.text[:300]}")

        for _ in range(min(50, n)):  # warm-up: connections, caches
            await client.post(url, content=body, headers=headers)
        t0 = time.perf_counter()
        await asyncio.gather(*(runner() for _ in range(concurrency)))
        elapsed = time.perf_counter() - t0
    return n / elapsed, latencies


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--serve", choices=["bare", "ours"])
    p.add_argument("--port", type=int)
    p.add_argument("--store")
    p.add_argument("--requests", type=int, default=2000)
    p.add_argument("--concurrency", type=int, default=16)
    p.add_argument("--rounds", type=int, default=3)
    p.add_argument("--batches", type=int, default=5)
    a = p.parse_args()
    if a.serve == "bare":
        return serve_bare(a.port)
    if a.serve == "ours":
        return serve_ours(a.port, a.store)

    with tempfile.TemporaryDirectory() as tmp:
        bare_port, our_port = free_port(), free_port()
        procs = [start("bare", bare_port, tmp), start("ours", our_port, tmp)]
        try:
            row = {"flow_lps": 61.5, "head_m": 33.0}
            body = httpx.Request("POST", "http://x", json={"rows": [row]}).content
            bare_url = f"http://127.0.0.1:{bare_port}/bare"
            our_url = f"http://127.0.0.1:{our_port}/v1/models/pumps/predict"
            check = httpx.post(our_url, content=body, headers={"content-type": "application/json"}).json()
            assert check["model"]["version"] == 1 and len(check["predictions"]) == 1, check
            bare_rps, our_rps, our_lat = [], [], []
            for i in range(a.rounds):
                rps, _ = asyncio.run(load(bare_url, body, a.requests, a.concurrency))
                bare_rps.append(rps)
                rps, lat = asyncio.run(load(our_url, body, a.requests, a.concurrency))
                our_rps.append(rps)
                our_lat.append(lat)
                print(f"round {i + 1}: bare {bare_rps[-1]:.0f} req/s, ours {our_rps[-1]:.0f} req/s", flush=True)
            best = int(np.argmax(our_rps))
            p99_ms = float(np.percentile(our_lat[best], 99)) * 1000
            ratio = max(our_rps) / max(bare_rps)

            batch = pump_table(10_000, seed=5)
            csv = "flow_lps,head_m\n" + "\n".join(f"{float(f)!r},{float(h)!r}" for f, h in zip(batch["flow_lps"], batch["head_m"]))
            times = []
            with httpx.Client(timeout=120) as c:
                for _ in range(a.batches):
                    t0 = time.perf_counter()
                    r = c.post(f"{our_url}?interval=0.9", content=csv, headers={"content-type": "text/csv"})
                    times.append(time.perf_counter() - t0)
                    assert r.status_code == 200 and r.text.count("\n") == 10_001, r.text[:300]
            rows_per_s = 10_000 / statistics.median(times)
            print(f"single-row predict: ours {max(our_rps):.0f} req/s vs bare {max(bare_rps):.0f} req/s "
                  f"({a.concurrency} in flight, {a.requests} requests per round, best of {a.rounds}); "
                  f"10,000-row CSV batch with 0.9 intervals: median {statistics.median(times) * 1000:.0f} ms")
            print(f"predict_rps_ratio={ratio:.3f} p99_ms={p99_ms:.2f} batch_rows_per_s={rows_per_s:.0f}")
        finally:
            for proc in procs:
                proc.terminate()
            for proc in procs:
                proc.wait(10)


if __name__ == "__main__":
    main()
