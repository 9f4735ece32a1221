"""A real Tikhon server on a free loopback port, for the tests (imported by the conftest files).

``running(app)`` serves an ASGI app with uvicorn in a background thread and yields its base URL;
``live_service(root, worker=True, **settings)`` builds app, store and (optionally) the embedded worker
exactly as ``tikhon serve`` does (``service.api.server.build``) over a store in ``root`` and yields
``(base_url, store, settings)``. Timings are small so the suites are quick; no test asserts on time.
"""

from __future__ import annotations

import contextlib
import socket
import threading
import time

import uvicorn

from service.settings import Settings


@contextlib.contextmanager
def running(app, *, host: str = "127.0.0.1"):
    """Yield the base URL of ``app`` served by uvicorn on a free loopback port; stop it afterwards."""
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind((host, 0))
    port = sock.getsockname()[1]
    config = uvicorn.Config(app, log_level="warning", access_log=False, lifespan="on", timeout_graceful_shutdown=5)
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    # Wait for start-up (a readiness wait, not a timed assertion: it fails only if the server never starts).
    deadline = time.monotonic() + 60
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            raise RuntimeError("uvicorn did not start")
        time.sleep(0.01)
    try:
        yield f"http://{host}:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)
        sock.close()


def make_settings(root, **over) -> Settings:
    base = dict(
        store=root / "store", data_dir=root / "data", worker_heartbeat_s=0.2, worker_poll_s=0.05,
        worker_stale_s=30.0, cancel_grace_s=5.0, auth_cache_s=0.0, live_cache_s=0.0, log_level="warning",
    )
    base.update(over)
    (root / "data").mkdir(parents=True, exist_ok=True)
    return Settings(**base)


@contextlib.contextmanager
def live_service(root, *, worker: bool = True, **over):
    from service.api.server import build

    settings = make_settings(root, **over)
    app, store, w = build(settings, embedded_worker=worker)
    if w is not None:
        w.start()
    try:
        with running(app) as base:
            yield base, store, settings
    finally:
        if w is not None:
            w.stop()
        store.close()


def wait_for(predicate, what: str, deadline_s: float = 300.0, every: float = 0.05):
    """Poll until ``predicate()`` returns a truthy value and return it (a readiness wait: it fails only if
    the state never comes, never because something was slow)."""
    end = time.monotonic() + deadline_s
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() > end:
            raise AssertionError(f"gave up waiting for {what}")
        time.sleep(every)
