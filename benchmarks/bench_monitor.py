"""What input monitoring costs single-row predictions: the same server with TIKHON_MONITOR on and off.

Both servers are ``tikhon serve --no-worker`` over the same store (the demo model of bench_serving), driven
one after the other in alternating rounds by ``wrk`` (a compiled load generator, so the client is not what
is measured) with one-row JSON bodies. The monitoring server counts every row into its version's bins and
writes its counts to the catalog every TIKHON_MONITOR_FLUSH_S seconds, as in production.

Last line: ``monitor_rps_ratio=<on/off, best rounds> monitor_per_cpu_ratio=<on/off, requests per server
CPU-second> on_rps=<> off_rps=<> counted_rows=<rows the monitoring server reported>``. Goal: a ratio of
at least 0.95 (a cost of at most 5 %). On a shared machine trust the per-CPU-second ratio more.

    python benchmarks/bench_monitor.py [--duration 10] [--rounds 3]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_serving import MODEL, ROOT, WRK_SCRIPT, _env, describe, free_port, run_wrk, start_server, stop  # noqa: E402


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--duration", type=float, default=10.0, help="seconds per wrk run [10]")
    p.add_argument("--connections", type=int, default=32, help="wrk connections [32]")
    p.add_argument("--rounds", type=int, default=3, help="alternating on/off rounds; the best of each is kept [3]")
    a = p.parse_args()
    if shutil.which("wrk") is None:
        print("bench_monitor: the load generator 'wrk' is not installed; install it with 'apt-get install wrk'.",
              file=sys.stderr)
        raise SystemExit(2)
    with tempfile.TemporaryDirectory(prefix="tikhon-bench-monitor-") as tmp:
        work = Path(tmp)
        (work / "data").mkdir()
        subprocess.run([sys.executable, str(ROOT / "benchmarks" / "bench_serving.py"), "--prepare", str(work / "store")],
                       env=_env(ROOT), check=True)
        script = work / "post.lua"
        script.write_text(WRK_SCRIPT)
        one = work / "one.json"
        one.write_bytes(json.dumps({"rows": [{"flow_lps": 61.5, "head_m": 33.0}]}).encode())
        ports = {"on": free_port(), "off": free_port()}
        procs = {k: start_server("ours", ports[k], work, env={"TIKHON_MONITOR": "true" if k == "on" else "false"})
                 for k in ports}
        try:
            urls = {k: f"http://127.0.0.1:{ports[k]}/v1/models/{MODEL}/predictions" for k in ports}
            print(f"wrk -t1 -c{a.connections} -d{a.duration:g}s, one-row JSON body, {os.cpu_count()} cores, "
                  f"load average before: {os.getloadavg()[0]:.2f}", flush=True)
            for k in ports:  # warm-up
                run_wrk(urls[k], one, "application/json", threads=1, connections=a.connections, duration=2,
                        server_pid=procs[k].pid, script=script)
            runs: dict[str, list] = {"on": [], "off": []}
            for i in range(a.rounds):
                for k in ("off", "on") if i % 2 == 0 else ("on", "off"):
                    runs[k].append(run_wrk(urls[k], one, "application/json", threads=1, connections=a.connections,
                                           duration=a.duration, server_pid=procs[k].pid, script=script))
                    print(f"round {i + 1} monitor {k:3s}: {describe(runs[k][-1])}", flush=True)
            import httpx

            counted = httpx.get(f"http://127.0.0.1:{ports['on']}/v1/models/{MODEL}/inputs", timeout=60).json()["rows"]
            uncounted = httpx.get(f"http://127.0.0.1:{ports['off']}/v1/models/{MODEL}/inputs", timeout=60).json()["rows"]
            best = {k: max(v, key=lambda r: r.rps) for k, v in runs.items()}
            per_cpu = {k: max(r.per_cpu_s for r in v) for k, v in runs.items()}
            print(f"load average after: {os.getloadavg()[0]:.2f}; rows counted by the monitoring server: {counted} "
                  f"(the other counted none of its own; catalog total {uncounted})")
        finally:
            stop(list(procs.values()))
    print(f"monitor_rps_ratio={best['on'].rps / best['off'].rps:.3f} "
          f"monitor_per_cpu_ratio={per_cpu['on'] / per_cpu['off']:.3f} on_rps={best['on'].rps:.0f} "
          f"off_rps={best['off'].rps:.0f} counted_rows={counted}")


if __name__ == "__main__":
    main()
