"""Scaling with API processes: single-row predict req/s of ``tikhon serve --workers 1`` and ``--workers 2``.

Both servers are the real command line (``tikhon serve --workers N --no-worker``, log level warning,
no API key, on loopback) over one store in a temporary folder holding one model of the invented
pump-station scenario (polynomial degrees 1-3 x 20 strengths, tuned by ``service.engine.tune``).
The load generator is ``wrk`` (compiled; ``wrk -t1 -c32 -d10s`` by default) posting one JSON row to
``/v1/models/pumps/predictions``. Rounds alternate 1 process / N processes; each is preceded by a short
warm-up; the best round of each count is kept (the least disturbed by other work on a shared machine).

wrk runs on the same machine and competes for the same cores as the server processes: on a 2-core
host, the second API process and wrk share what the first process leaves. The script reports the CPU
wrk used (its own rusage) and the CPU each server process used (``/proc/<pid>/stat``) during each round,
and the load average before it started, so the figures come with their conditions.

``measure_workers_scaling(...)`` does the work and returns the figures (``bench_serving.py`` can call
it); run as a script, the last line is ``workers_scaling=<rps with N / rps with 1>``.
"""

from __future__ import annotations

import argparse
import os
import re
import resource
import shutil
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
ROW_BODY = '{"rows":[{"flow_lps":61.5,"head_m":33.0}]}'
_TICKS = os.sysconf("SC_CLK_TCK")


def pump_table(n: int, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    flow = rng.uniform(5.0, 120.0, n)
    head = rng.uniform(10.0, 60.0, n)
    energy = 3.0 + 0.5 * flow + 0.02 * flow * head - 0.004 * flow**2 + rng.normal(0.0, 2.0, n)
    return {"flow_lps": flow, "head_m": head, "energy_kwh": energy}


def make_store(store_dir: Path) -> None:
    """One live model, 'pumps' version 1, published through the store."""
    from service.engine import tune
    from service.settings import Settings
    from service.store import Store

    store = Store(Settings(store=store_dir, data_dir=store_dir))
    try:
        spec = {"target": "energy_kwh", "bases": [{"kind": "polynomial", "degrees": [1, 2, 3]}],
                "penalty": {"kind": "l2", "strengths": {"min": 1e-4, "max": 1e2, "count": 20}}}
        body, arrays = tune(pump_table(2000, seed=1), spec).to_artifact()
        store.publish("pumps", body, arrays)
        store.set_live("pumps", 1, actor="benchmark", reason="benchmark model")
    finally:
        store.close()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Server:
    """``tikhon serve --workers N --no-worker`` in its own process group."""

    def __init__(self, workers: int, store_dir: Path):
        self.workers = workers
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        env = {k: v for k, v in os.environ.items() if not k.startswith("TIKHON_")}
        env.update(PYTHONPATH=str(ROOT) + os.pathsep + env.get("PYTHONPATH", ""), TIKHON_STORE=str(store_dir),
                   TIKHON_DATA_DIR=str(store_dir), TIKHON_LOG_LEVEL="warning", TIKHON_PORT=str(self.port))
        self.proc = subprocess.Popen(
            [sys.executable, "-c", "import sys; from service.cli import main; sys.exit(main(sys.argv[1:]))",
             "serve", "--workers", str(workers), "--no-worker"],
            env=env, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)

    def wait_ready(self, deadline_s: float = 180.0) -> None:
        """Every process answering: /healthz on fresh connections until ``workers`` distinct processes replied."""
        end = time.monotonic() + deadline_s
        seen: set[str] = set()
        while len(seen) < self.workers:
            if self.proc.poll() is not None:
                raise SystemExit(f"tikhon serve --workers {self.workers} exited with {self.proc.returncode}")
            if time.monotonic() > end:
                raise SystemExit(f"tikhon serve --workers {self.workers} did not start")
            try:
                r = httpx.get(f"{self.url}/healthz", timeout=2)
                if r.status_code == 200:
                    seen.add(r.headers.get("x-tikhon-process", "single"))
            except httpx.HTTPError:
                time.sleep(0.1)

    def pids(self) -> list[int]:
        """The processes that answer HTTP: the supervisor's children, or the server itself with one process."""
        if self.workers == 1:
            return [self.proc.pid]
        text = Path(f"/proc/{self.proc.pid}/task/{self.proc.pid}/children").read_text()
        return [int(p) for p in text.split()]

    def stop(self) -> None:
        self.proc.terminate()
        try:
            self.proc.wait(60)
        except subprocess.TimeoutExpired:
            os.killpg(self.proc.pid, 9)
            self.proc.wait()


def cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / _TICKS  # utime, stime (proc(5))


def run_wrk(url: str, script: Path, threads: int, connections: int, duration_s: float) -> dict:
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    out = subprocess.run(["wrk", f"-t{threads}", f"-c{connections}", f"-d{duration_s:g}s", "--latency", "-s",
                          str(script), url], capture_output=True, text=True, check=True).stdout
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    rps = float(re.search(r"Requests/sec:\s+([\d.]+)", out).group(1))
    total = int(re.search(r"(\d+) requests in", out).group(1))
    bad = re.search(r"Non-2xx or 3xx responses: (\d+)", out)
    errors = re.search(r"Socket errors: connect (\d+), read (\d+), write (\d+), timeout (\d+)", out)
    p99 = re.search(r"^\s+99%\s+([\d.]+)(us|ms|s)\s*$", out, re.M)
    scale = {"us": 1e-3, "ms": 1.0, "s": 1e3}
    return {
        "rps": rps, "requests": total, "non_2xx": int(bad.group(1)) if bad else 0,
        "socket_errors": dict(zip(("connect", "read", "write", "timeout"), map(int, errors.groups()))) if errors else {},
        "p99_ms": float(p99.group(1)) * scale[p99.group(2)] if p99 else float("nan"),
        "wrk_cpu_cores": ((after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)) / duration_s,
    }


def measure_workers_scaling(*, counts: tuple[int, ...] = (1, 2), duration_s: float = 10.0, connections: int = 32,
                            threads: int = 1, rounds: int = 2, warmup_s: float = 2.0, log=print) -> dict:
    """Single-row predict req/s for each process count, measured with wrk in alternating rounds in one run.

    Returns ``{"best": {count: round}, "rounds": [...], "scaling": best[max]/best[1], "loadavg": ...,
    "cores": ...}``; each round holds wrk's figures and the CPU used by wrk and by each server process."""
    if shutil.which("wrk") is None:
        raise SystemExit("wrk is not installed (Debian: apt-get install wrk)")
    results: list[dict] = []
    loadavg = os.getloadavg()
    with tempfile.TemporaryDirectory(prefix="tikhon-bench-workers-") as tmp:
        store_dir = Path(tmp) / "store"
        make_store(store_dir)
        script = Path(tmp) / "predict.lua"
        script.write_text('wrk.method = "POST"\n'
                          f"wrk.body = '{ROW_BODY}'\n"
                          'wrk.headers["Content-Type"] = "application/json"\n')
        servers = {n: Server(n, store_dir) for n in counts}
        try:
            for server in servers.values():
                server.wait_ready()
            for n, server in servers.items():
                check = httpx.post(f"{server.url}/v1/models/pumps/predictions", content=ROW_BODY,
                                   headers={"content-type": "application/json"}, timeout=30).json()
                assert check["model"]["version"] == 1 and len(check["predictions"]) == 1, check
            url_of = {n: f"{s.url}/v1/models/pumps/predictions" for n, s in servers.items()}
            for i in range(rounds):
                for n, server in servers.items():
                    run_wrk(url_of[n], script, threads, connections, warmup_s)
                    pids = server.pids()
                    cpu0 = {p: cpu_seconds(p) for p in pids}
                    fig = run_wrk(url_of[n], script, threads, connections, duration_s)
                    fig["server_cpu_cores"] = [round((cpu_seconds(p) - cpu0[p]) / duration_s, 2) for p in pids]
                    fig.update(processes=n, round=i + 1)
                    results.append(fig)
                    log(f"round {i + 1}, {n} process(es): {fig['rps']:.0f} req/s, p99 {fig['p99_ms']:.1f} ms, "
                        f"non-2xx {fig['non_2xx']}, socket errors {fig['socket_errors'] or 0} (wrk counts an answer "
                        f"slower than 2 s as a timeout); CPU cores used: "
                        f"wrk {fig['wrk_cpu_cores']:.2f}, server processes {fig['server_cpu_cores']}")
        finally:
            for server in servers.values():
                server.stop()
    best = {n: max((r for r in results if r["processes"] == n), key=lambda r: r["rps"]) for n in counts}
    return {"best": best, "rounds": results, "scaling": best[max(counts)]["rps"] / best[min(counts)]["rps"],
            "loadavg": loadavg, "cores": os.cpu_count()}


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--workers", type=int, default=2, help="process count compared with 1 (default 2)")
    p.add_argument("--duration", type=float, default=10.0, help="seconds per wrk round (default 10)")
    p.add_argument("--connections", type=int, default=32, help="wrk connections (default 32)")
    p.add_argument("--threads", type=int, default=1, help="wrk threads (default 1)")
    p.add_argument("--rounds", type=int, default=2, help="rounds per process count (default 2)")
    a = p.parse_args()
    out = measure_workers_scaling(counts=(1, a.workers), duration_s=a.duration, connections=a.connections,
                                  threads=a.threads, rounds=a.rounds)
    one, many = out["best"][1], out["best"][a.workers]
    print(f"single-row predict with wrk -t{a.threads} -c{a.connections} -d{a.duration:g}s, best of {a.rounds}: "
          f"1 process {one['rps']:.0f} req/s (p99 {one['p99_ms']:.1f} ms), {a.workers} processes "
          f"{many['rps']:.0f} req/s (p99 {many['p99_ms']:.1f} ms). wrk ran on the same {out['cores']}-core "
          f"machine and competed for its cores (it used {many['wrk_cpu_cores']:.2f} cores in the best "
          f"{a.workers}-process round); the server processes used {sum(one['server_cpu_cores']):.2f} cores (1 process) "
          f"and {sum(many['server_cpu_cores']):.2f} cores ({a.workers} processes: "
          f"{', '.join(f'{c:.2f}' for c in many['server_cpu_cores'])}); load average before the run "
          f"{' '.join(f'{x:.2f}' for x in out['loadavg'])}. A scaling figure means something only when the "
          f"{a.workers}-process round got more CPU than the 1-process round.")
    print(f"workers_scaling={out['scaling']:.3f}")


if __name__ == "__main__":
    main()
