"""Serving speed against a bare endpoint, driven by ``wrk`` (a compiled HTTP load generator).

Two servers run as subprocesses on loopback with the same uvicorn options
(``service.api.server.uvicorn_options``: the project's defaults, log level ``info`` included):

* ``bare``: a FastAPI app with one POST route that reads the body and answers a constant JSON object;
* ``ours``: ``tikhon serve --no-worker`` (the real command line) over a store in a temporary folder
  holding one model of the invented pump-station scenario (polynomial degrees 1-3 tuned by
  ``service.engine.tune`` on 2,000 rows, 5 folds, so CV+ intervals use 5 fold models and 2,000
  residuals). No API key exists, so the routes are open (loopback only). Its JSON log lines go to a file.

Single rows: ``wrk -t<threads> -c<connections> -d<duration>`` posts the same one-row JSON body; rounds
alternate bare/ours and the best round of each is kept (the least disturbed on a shared machine). The
CPU time of ``wrk`` and of each server is printed beside every round, so a saturated load generator
shows (``wrk`` should use well under one core while the bare server uses about one).

On a shared machine the servers get only part of a core each; every run also prints requests per
second of server CPU time, which such contention disturbs much less than requests per second.

Batches: ``wrk -t1 -c1`` posts a 10,000-row CSV body (``Accept: application/json``), without and with
``?interval_level=0.9``; rows per second = requests per second × rows.

``wrk`` is the Debian package ``wrk``; without it the script says how to install it and exits 2.
``--stack h11`` runs both servers on uvicorn's pure-Python stack (h11 parser, asyncio loop) instead of
the project's default (httptools and uvloop); ``--code PATH`` runs both servers from another checkout
(a before/after comparison in the same conditions); ``--server-arg`` passes extra arguments to ``tikhon serve`` (``start_server`` takes them
too, for benchmarks of other server options).

Last line: ``predict_rps_ratio=<ours/bare> p99_ms=<ours> bare_p99_ms=<bare> batch_rows_per_s=<plain>
batch_interval_rows_per_s=<with 0.9 intervals>``; with ``--workers N`` (N >= 2) it also measures single-row
predict through ``tikhon serve --workers 1`` and ``--workers N`` in the same run (``bench_workers``) and
adds ``workers_scaling=<rps with N / rps with 1>``.
"""

import argparse
import json
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
# Both servers read these settings (service.api.server.uvicorn_options); {} keeps the project's defaults.
STACKS = {"default": {}, "h11": {"TIKHON_SERVER_HTTP": "h11", "TIKHON_SERVER_LOOP": "asyncio"}}
MODEL = "pumps"
CLK_TCK = os.sysconf("SC_CLK_TCK")

WRK_SCRIPT = """
local f = assert(io.open(os.getenv("BENCH_BODY"), "rb"))
wrk.method = "POST"
wrk.body = f:read("*a")
f:close()
wrk.headers["Content-Type"] = os.getenv("BENCH_CONTENT_TYPE")
wrk.headers["Accept"] = "application/json"
done = function(summary, latency, requests)
  local e = summary.errors
  io.write(string.format("WRK_RESULT %d %d %d %d %.1f %.1f\\n", summary.requests, summary.duration,
    e.connect + e.read + e.write + e.timeout, e.status, latency:percentile(50), latency:percentile(99)))
end
"""


# ----------------------------------------------------------------------------------------------------
# run inside the servers' interpreter (``--code`` checkout on PYTHONPATH)


def pump_table(n: int, seed: int):
    import numpy as np

    rng = np.random.default_rng(seed)
    flow = rng.uniform(5.0, 120.0, n)
    head = rng.uniform(10.0, 60.0, n)
    energy = 3.0 + 0.5 * flow + 0.02 * flow * head - 0.004 * flow**2 + rng.normal(0.0, 2.0, n)
    return {"flow_lps": flow, "head_m": head, "energy_kwh": energy}


def prepare_store(store_dir: str) -> None:
    """Train the benchmark model and make it live in a fresh store."""
    from service.engine import tune
    from service.settings import Settings
    from service.store import Store

    store = Store(Settings(store=store_dir, data_dir=store_dir))
    spec = {"target": "energy_kwh", "bases": [{"kind": "polynomial", "degrees": [1, 2, 3]}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-4, "max": 1e2, "count": 20}}}
    body, arrays = tune(pump_table(2000, seed=1), spec).to_artifact()
    store.publish(MODEL, body, arrays)
    store.set_live(MODEL, 1, actor="benchmark", reason="benchmark model")
    store.close()


def serve_bare(port: int) -> None:
    import uvicorn

    from service.logs import configure
    from service.settings import Settings

    settings = Settings(port=port)
    try:
        from service.api.server import uvicorn_options
        options = uvicorn_options(settings)
    except ImportError:  # a checkout from before uvicorn_options existed: the literal options its run() used
        options = dict(host=settings.host, port=settings.port, log_config=None, access_log=False,
                       log_level=settings.log_level.lower(), server_header=False)
    configure(settings.log_level)
    uvicorn.run(bare_app(), **options)


def bare_app():
    """The reference: a FastAPI app with one POST route that reads the body and answers a constant JSON object."""
    from fastapi import FastAPI, Request
    from fastapi.responses import Response

    app = FastAPI()
    constant = b'{"status":"ok","value":1.0}'

    @app.post("/bare")
    async def bare(request: Request):
        await request.body()
        return Response(constant, media_type="application/json")

    return app


# ----------------------------------------------------------------------------------------------------
# harness


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _env(code: Path, extra: dict[str, str] | None = None) -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": str(code), **(extra or {})}


def start_server(kind: str, port: int, workdir: Path, *, code: Path = ROOT, extra_args: list[str] | tuple = (),
                 env: dict[str, str] | None = None) -> subprocess.Popen:
    """Start ``bare`` or ``ours`` on ``port`` and wait until it answers. ``ours`` is ``tikhon serve --no-worker``
    over the store in ``workdir/store`` plus ``extra_args``; stderr (the JSON log) goes to ``workdir/<kind>.log``."""
    if kind == "bare":
        args = [sys.executable, __file__, "--serve-bare", str(port)]
    else:
        args = [sys.executable, "-m", "service.cli", "serve", "--no-worker", "--port", str(port), *extra_args]
    log = open(workdir / f"{kind}-{port}.log", "ab")
    settings_env = {"TIKHON_STORE": str(workdir / "store"), "TIKHON_DATA_DIR": str(workdir / "data"), **(env or {})}
    proc = subprocess.Popen(args, cwd=workdir, env=_env(code, settings_env), stdout=log, stderr=log)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise SystemExit(f"{kind} server exited with {proc.returncode}; see {log.name}")
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.5):
                return proc
        except OSError:
            time.sleep(0.1)
    proc.kill()
    raise SystemExit(f"{kind} server did not start within 120 s; see {log.name}")


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process so far (/proc/PID/stat fields 14 and 15)."""
    with open(f"/proc/{pid}/stat") as fh:
        fields = fh.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / CLK_TCK


@dataclass
class WrkRun:
    rps: float
    p50_ms: float
    p99_ms: float
    requests: int
    wrk_cpu: float  # cores used by wrk on average
    server_cpu: float  # cores used by the server on average

    @property
    def per_cpu_s(self) -> float:
        """Requests per second of server CPU time: what a run on a machine shared with other work still shows."""
        return self.rps / max(self.server_cpu, 1e-9)


def run_wrk(url: str, body: Path, content_type: str, *, threads: int, connections: int, duration: float,
            server_pid: int, script: Path) -> WrkRun:
    """One wrk run; refuses a run with any socket error or non-2xx answer."""
    args = ["wrk", f"-t{threads}", f"-c{connections}", f"-d{duration:g}s", "--timeout", "60s", "-s", str(script), url]
    env = {**os.environ, "BENCH_BODY": str(body), "BENCH_CONTENT_TYPE": content_type}
    s0 = cpu_seconds(server_pid)
    t0 = time.perf_counter()
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, env=env)
    out = proc.stdout.read().decode()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    s1 = cpu_seconds(server_pid)
    line = next((ln for ln in out.splitlines() if ln.startswith("WRK_RESULT")), None)
    if status != 0 or line is None:
        raise SystemExit(f"wrk failed on {url}:\n{out}")
    n, dur_us, sock_err, status_err, p50, p99 = line.split()[1:]
    if int(sock_err) or int(status_err):
        raise SystemExit(f"wrk saw {sock_err} socket errors and {status_err} non-2xx answers on {url}:\n{out}")
    return WrkRun(rps=int(n) / (int(dur_us) / 1e6), p50_ms=float(p50) / 1000, p99_ms=float(p99) / 1000,
                  requests=int(n), wrk_cpu=(usage.ru_utime + usage.ru_stime) / wall, server_cpu=(s1 - s0) / wall)


def stop(procs: list[subprocess.Popen]) -> None:
    for proc in procs:
        if proc.poll() is None:
            proc.terminate()
    for proc in procs:
        try:
            proc.wait(15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def describe(r: WrkRun) -> str:
    return (f"{r.rps:8.0f} req/s  p50 {r.p50_ms:6.2f} ms  p99 {r.p99_ms:6.2f} ms  "
            f"(server {r.server_cpu:.2f} cores: {r.per_cpu_s:.0f} req per CPU-second; wrk {r.wrk_cpu:.2f} cores)")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--serve-bare", type=int, metavar="PORT", help=argparse.SUPPRESS)
    p.add_argument("--prepare", metavar="STORE", help=argparse.SUPPRESS)
    p.add_argument("--duration", type=float, default=10.0, help="seconds per single-row wrk run [10]")
    p.add_argument("--threads", type=int, default=1, help="wrk threads for single rows [1]")
    p.add_argument("--connections", type=int, default=32, help="wrk connections for single rows [32]")
    p.add_argument("--rounds", type=int, default=2, help="alternating bare/ours rounds; the best of each is kept [2]")
    p.add_argument("--batch-rows", type=int, default=10_000)
    p.add_argument("--batch-duration", type=float, default=8.0, help="seconds per batch wrk run [8]")
    p.add_argument("--code", type=Path, default=ROOT, help="checkout whose service package the servers run [this one]")
    p.add_argument("--server-arg", action="append", default=[], help="extra argument for 'tikhon serve' (repeatable)")
    p.add_argument("--stack", choices=sorted(STACKS), default="default",
                   help="server stack of both servers: default (the project's settings: httptools and uvloop when "
                   "installed) or h11 (h11 parser, asyncio loop) [default]")
    p.add_argument("--workers", type=int, default=1,
                   help="also measure 'tikhon serve --workers 1' against '--workers N' (N >= 2) [1: skip]")
    a = p.parse_args()
    if a.serve_bare:
        return serve_bare(a.serve_bare)
    if a.prepare:
        return prepare_store(a.prepare)
    if shutil.which("wrk") is None:
        print("bench_serving: the load generator 'wrk' is not installed; install it with 'apt-get install wrk' "
              "(Debian/Ubuntu package wrk) and run again.", file=sys.stderr)
        raise SystemExit(2)
    code = a.code.resolve()

    with tempfile.TemporaryDirectory(prefix="tikhon-bench-") as tmp:
        work = Path(tmp)
        (work / "data").mkdir()
        subprocess.run([sys.executable, __file__, "--prepare", str(work / "store")], env=_env(code), check=True)
        script = work / "post.lua"
        script.write_text(WRK_SCRIPT)
        one = work / "one.json"
        one.write_bytes(json.dumps({"rows": [{"flow_lps": 61.5, "head_m": 33.0}]}).encode())
        batch = pump_table(a.batch_rows, seed=5)
        csv_body = work / "batch.csv"
        csv_body.write_text("flow_lps,head_m\n" + "\n".join(
            f"{float(f)!r},{float(h)!r}" for f, h in zip(batch["flow_lps"], batch["head_m"])) + "\n")

        bare_port, our_port = free_port(), free_port()
        stack = STACKS[a.stack]
        procs = [start_server("bare", bare_port, work, code=code, env=stack),
                 start_server("ours", our_port, work, code=code, extra_args=a.server_arg, env=stack)]
        try:
            import httpx

            our_url = f"http://127.0.0.1:{our_port}/v1/models/{MODEL}/predictions"
            bare_url = f"http://127.0.0.1:{bare_port}/bare"
            check = httpx.post(our_url, content=one.read_bytes(), headers={"content-type": "application/json"}).json()
            assert check["model"]["version"] == 1 and len(check["predictions"]) == 1, check
            check = httpx.post(our_url + "?interval_level=0.9", content=csv_body.read_bytes(), timeout=120,
                               headers={"content-type": "text/csv", "accept": "application/json"}).json()
            assert len(check["predictions"]) == a.batch_rows and check["predictions"][0]["interval"][0] is not None
            print(f"wrk -t{a.threads} -c{a.connections} -d{a.duration:g}s, one-row JSON body, {os.cpu_count()} cores, "
                  f"load average before: {os.getloadavg()[0]:.2f}; stack: {a.stack}; code: {code}", flush=True)
            for url, pid in ((bare_url, procs[0].pid), (our_url, procs[1].pid)):  # warm-up
                run_wrk(url, one, "application/json", threads=1, connections=a.connections, duration=2,
                        server_pid=pid, script=script)
            bare_runs, our_runs = [], []
            for i in range(a.rounds):
                bare_runs.append(run_wrk(bare_url, one, "application/json", threads=a.threads, connections=a.connections,
                                         duration=a.duration, server_pid=procs[0].pid, script=script))
                print(f"round {i + 1} bare: {describe(bare_runs[-1])}", flush=True)
                our_runs.append(run_wrk(our_url, one, "application/json", threads=a.threads, connections=a.connections,
                                        duration=a.duration, server_pid=procs[1].pid, script=script))
                print(f"round {i + 1} ours: {describe(our_runs[-1])}", flush=True)
            bare = max(bare_runs, key=lambda r: r.rps)
            ours = max(our_runs, key=lambda r: r.rps)
            if max(r.wrk_cpu for r in bare_runs + our_runs) > 0.9 * a.threads:
                print("warning: wrk used nearly all of its threads' CPU; it may limit the figures (try --threads 2)")

            batch_rps = {}
            for label, query in (("plain", ""), ("interval 0.9", "?interval_level=0.9")):
                r = run_wrk(our_url + query, csv_body, "text/csv", threads=1, connections=1, duration=a.batch_duration,
                            server_pid=procs[1].pid, script=script)
                batch_rps[label] = r.rps * a.batch_rows
                print(f"batch {a.batch_rows} CSV rows, {label}: {r.requests} requests, median {r.p50_ms:.1f} ms, "
                      f"{batch_rps[label]:,.0f} rows/s (server {r.server_cpu:.2f} cores: "
                      f"{batch_rps[label] / max(r.server_cpu, 1e-9):,.0f} rows per CPU-second)", flush=True)
            print(f"load average after: {os.getloadavg()[0]:.2f}")
            print(f"requests per server CPU-second: ours {ours.per_cpu_s:.0f}, bare {bare.per_cpu_s:.0f}, "
                  f"ratio {ours.per_cpu_s / bare.per_cpu_s:.3f} (the best rounds; robust to a shared machine)")
            last = (f"predict_rps_ratio={ours.rps / bare.rps:.3f} p99_ms={ours.p99_ms:.2f} "
                    f"bare_p99_ms={bare.p99_ms:.2f} batch_rows_per_s={batch_rps['plain']:.0f} "
                    f"batch_interval_rows_per_s={batch_rps['interval 0.9']:.0f}")
        finally:
            stop(procs)
    if a.workers >= 2:  # after the servers above have stopped, so the processes do not share the cores with them
        from bench_workers import measure_workers_scaling

        out = measure_workers_scaling(counts=(1, a.workers), duration_s=a.duration, connections=a.connections,
                                      threads=a.threads, rounds=a.rounds)
        print(f"workers: 1 process {out['best'][1]['rps']:.0f} req/s, {a.workers} processes "
              f"{out['best'][a.workers]['rps']:.0f} req/s (wrk competes for the same cores)")
        last += f" workers_scaling={out['scaling']:.3f}"
    print(last)


if __name__ == "__main__":
    main()
