"""CPU time per single-row prediction, the application alone, against the bare endpoint: no socket, no server.

``bench_serving.py`` measures requests per second through uvicorn with ``wrk``; on a shared 2-core machine
those figures move with whatever else runs. This script drives both ASGI applications directly in this
process (``await app(scope, receive, send)``, the call uvicorn makes per request) and reads the process's
CPU clock (``time.process_time``), which other processes disturb far less than a wall clock. What it
leaves out (the HTTP parser, the socket writes, the event loop's own work) is the same for both servers, so
its ratio is the stricter one: ``bench_serving``'s ratio sits between it and 1.

* ``bare``: the same FastAPI app as ``bench_serving``'s bare endpoint (reads the body, answers a constant
  JSON object);
* ``ours``: ``service.api.app.create_app`` over a store in a temporary folder holding ``bench_serving``'s
  model (invented pump stations, polynomial degrees 1-3, CV+ intervals over 5 folds), with the project's
  default settings, JSON log lines written to a file in the temporary folder as ``tikhon serve`` writes them
  to stderr.

Rounds alternate bare/ours; the best round of each is kept. ``--profile FILE`` writes a cProfile of the
``ours`` requests (``python -m pstats FILE``).

Last line: ``cpu_us_bare=<µs per request> cpu_us_ours=<µs> cpu_ratio=<bare/ours> cpu_us_ours_interval=<µs, 0.9
interval>``.
"""

import argparse
import asyncio
import gc
import logging
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from benchmarks.bench_serving import MODEL, bare_app, prepare_store  # noqa: E402  (imports no service module)

if "--code" in sys.argv:  # the service package of another checkout (a before/after comparison)
    sys.path.insert(0, str(Path(sys.argv[sys.argv.index("--code") + 1]).resolve()))

BODY = b'{"rows":[{"flow_lps":60.0,"head_m":30.0}]}'
BODY_INTERVAL = b'{"rows":[{"flow_lps":60.0,"head_m":30.0}],"interval_level":0.9}'


def scope_of(path: str, body: bytes) -> dict:
    return {
        "type": "http", "asgi": {"version": "3.0", "spec_version": "2.3"}, "http_version": "1.1",
        "method": "POST", "scheme": "http", "path": path, "raw_path": path.encode(), "root_path": "",
        "query_string": b"", "server": ("127.0.0.1", 8000), "client": ("127.0.0.1", 40000),
        "headers": [(b"host", b"127.0.0.1:8000"), (b"content-type", b"application/json"),
                    (b"accept", b"application/json"), (b"content-length", str(len(body)).encode())],
    }


async def drive(app, path: str, body: bytes, count: int) -> tuple[float, int]:
    """CPU seconds for ``count`` requests and the last status."""
    status = [0]

    async def send(message):
        if message["type"] == "http.response.start":
            status[0] = message["status"]

    async def receive():
        return {"type": "http.request", "body": body, "more_body": False}

    template = scope_of(path, body)
    started = time.process_time()
    for _ in range(count):
        await app(dict(template, headers=list(template["headers"])), receive, send)
    return time.process_time() - started, status[0]


async def lifespan(app, phase: str, queue: dict) -> None:
    """Run the app's lifespan startup (``queue`` keeps the task for the shutdown)."""
    if phase == "startup":
        inbox: asyncio.Queue = asyncio.Queue()
        outbox: asyncio.Queue = asyncio.Queue()
        queue.update(inbox=inbox, outbox=outbox)
        queue["task"] = asyncio.ensure_future(app({"type": "lifespan", "asgi": {"version": "3.0"}, "state": {}},
                                                  inbox.get, outbox.put))
    await queue["inbox"].put({"type": f"lifespan.{phase}"})
    message = await queue["outbox"].get()
    if not message["type"].endswith(".complete"):
        raise SystemExit(f"lifespan {phase} failed: {message}")


async def main_async(args) -> None:
    from service.api.app import create_app
    from service.logs import configure
    from service.settings import Settings

    work = Path(tempfile.mkdtemp(prefix="tikhon-cpu-"))
    prepare_store(str(work / "store"))
    settings = Settings(store=str(work / "store"), data_dir=str(work / "data"))
    log = open(work / "server.log", "w")  # noqa: SIM115 — open for the run, as tikhon serve's stderr would be
    hold = getattr(settings, "access_log_hold_s", None)  # as tikhon serve writes its log lines to stderr
    configure(settings.log_level, stream=log, **({} if hold is None else {"hold_s": hold}))
    ours = create_app(settings)
    life: dict = {}
    await lifespan(ours, "startup", life)
    bare = bare_app()
    path = f"/v1/models/{MODEL}/predictions"
    gc.collect()  # as tikhon serve does before it serves (service.api.server.run)
    gc.freeze()

    _, code = await drive(ours, path, BODY, 200)  # warm: loads the version, fills caches
    if code != 200:
        raise SystemExit(f"ours answered {code}; see {work / 'server.log'}")
    await drive(bare, "/bare", BODY, 200)
    best = {"bare": float("inf"), "ours": float("inf"), "interval": float("inf")}
    for _ in range(args.rounds):
        for kind, app, p, body in (("bare", bare, "/bare", BODY), ("ours", ours, path, BODY),
                                   ("interval", ours, path, BODY_INTERVAL)):
            cpu, code = await drive(app, p, body, args.requests)
            if code != 200:
                raise SystemExit(f"{kind} answered {code}")
            best[kind] = min(best[kind], cpu / args.requests)
        print(f"round: bare {best['bare'] * 1e6:.1f} µs  ours {best['ours'] * 1e6:.1f} µs  "
              f"interval {best['interval'] * 1e6:.1f} µs (best so far)", flush=True)
    if args.profile:
        import cProfile

        prof = cProfile.Profile()
        prof.enable()
        await drive(ours, path, BODY, args.requests)
        prof.disable()
        prof.dump_stats(args.profile)
    await lifespan(ours, "shutdown", life)
    logging.shutdown()
    import service

    print(f"code: {Path(service.__file__).parents[1]}; load average: {os.getloadavg()[0]:.1f}", flush=True)
    print(f"cpu_us_bare={best['bare'] * 1e6:.1f} cpu_us_ours={best['ours'] * 1e6:.1f} "
          f"cpu_ratio={best['bare'] / best['ours']:.3f} cpu_us_ours_interval={best['interval'] * 1e6:.1f}", flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--requests", type=int, default=3000, help="requests per round")
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--code", help="checkout whose service package is measured [this one]")
    parser.add_argument("--profile", help="write a cProfile of the 'ours' requests to this file")
    args = parser.parse_args()
    asyncio.run(main_async(args))


if __name__ == "__main__":
    main()
