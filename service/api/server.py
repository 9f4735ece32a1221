"""Serving: ``run(settings)`` is what ``tikhon serve`` calls.

It builds the store, the app and (unless ``settings.embedded_worker`` is off) a training worker in a
background thread, then runs uvicorn. Before binding it checks access control: when no active API
key exists the routes are open, so the server refuses to bind anything but a loopback address and
says how to fix it.
"""

from __future__ import annotations

import gc
import ipaddress
import logging
import socket

import uvicorn

from service.api.supervisor import process_count  # also what `tikhon serve` reports
from service.errors import Forbidden
from service.settings import Settings

log = logging.getLogger("tikhon.api")


def is_loopback(host: str) -> bool:
    """True when every address ``host`` resolves to is a loopback address (127.0.0.0/8, ::1)."""
    if host in ("localhost",):
        host = "127.0.0.1"
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        pass
    try:
        infos = socket.getaddrinfo(host, None)
    except socket.gaierror:
        return False
    addrs = {info[4][0] for info in infos}
    return bool(addrs) and all(ipaddress.ip_address(a.split("%")[0]).is_loopback for a in addrs)


def check_bind(host: str, keys_exist: bool) -> None:
    """Refuse to serve open routes beyond this machine."""
    if not keys_exist and not is_loopback(host):
        raise Forbidden(
            f"refusing to listen on {host}: no API key exists, so every route would be open to the network. "
            "Create a key first ('tikhon keys create --scope admin'), or listen on 127.0.0.1 (TIKHON_HOST)."
        )


def build(settings: Settings, *, embedded_worker: bool | None = None, **app_options):
    """(app, store, worker or None) wired together: the worker's promotions clear the app's live cache.

    ``app_options`` go to ``create_app`` (the multi-process server's metrics folder and process header)."""
    from service.api.app import create_app
    from service.store import Store
    from service.worker import Worker

    store = Store(settings)
    use_worker = settings.embedded_worker if embedded_worker is None else embedded_worker
    holder: dict = {}

    def stop_worker() -> None:
        if holder.get("worker") is not None:
            holder["worker"].stop()

    app = create_app(settings, store, on_shutdown=[stop_worker], **app_options)
    if store.keys.any_active():  # started with keys: they stay required (service.api.auth.KeyGate.close)
        app.state.gate.close()
    worker = None
    if use_worker:
        worker = Worker(settings, store, on_live_change=app.state.models.forget_live)
        holder["worker"] = worker
    return app, store, worker


def uvicorn_options(settings: Settings) -> dict:
    """The uvicorn keyword arguments ``run`` uses (the serving benchmark starts its bare reference endpoint
    with the same ones, so both servers differ only in the application)."""
    return dict(host=settings.host, port=settings.port, log_config=None, access_log=False,
                log_level=settings.log_level.lower(), server_header=False, http=settings.server_http,
                loop=settings.server_loop, timeout_graceful_shutdown=settings.shutdown_grace_s)


def run(settings: Settings) -> None:
    """Start the HTTP server (and the embedded worker) until interrupted.

    With ``settings.workers`` above 1 (or 'auto' on a machine with several cores) the server is several
    processes on one socket under a supervisor (``service.api.supervisor``); with 1, this process."""
    from service.logs import configure

    count = process_count(settings.workers)
    if count > 1:
        from service.api.supervisor import Supervisor

        Supervisor(settings, count).run()
        return

    configure(settings.log_level, hold_s=settings.access_log_hold_s)
    app, store, worker = build(settings)
    keys_exist = store.keys.any_active()
    check_bind(settings.host, keys_exist)
    if not keys_exist:
        log.warning("no API key exists: routes are open, listening on loopback only",
                    extra={"host": settings.host, "port": settings.port})
    if worker is not None:
        worker.start()
    # Everything built so far (libraries, the app, the store) lives as long as the process: moving it out of
    # the garbage collector's generations keeps each full collection to what requests allocate. A 10,000-row
    # prediction allocates one list per row, and scanning the ~180,000 start-up objects on each full
    # collection cost more than the prediction itself (16 against 8 ms of CPU per batch, measured).
    gc.collect()
    gc.freeze()
    try:
        uvicorn.run(app, **uvicorn_options(settings))
    finally:
        if worker is not None:
            worker.stop()
        store.close()
