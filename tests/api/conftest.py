"""Run an ASGI app under a real uvicorn server on a loopback port, in a background thread."""

from __future__ import annotations

import contextlib
import socket
import threading
import time

import pytest
import uvicorn


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
    deadline = time.monotonic() + 30
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


@pytest.fixture(scope="session")
def serve():
    """The ``running(app)`` context manager, as a fixture (test modules here are not a package)."""
    return running
