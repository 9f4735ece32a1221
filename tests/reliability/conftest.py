"""Shared by the reliability tests: real servers and workers in their own processes, store snapshots,
the demo model, and the short/full switch.

Short or full
-------------
The long checks (schema fuzzing, the soak, the crash loops) are marked ``slow``. They always run; the
``full`` fixture says at which size. ``pip install -e ".[test]" && pytest`` runs the short form;
``TIKHON_CI_FULL=1`` (exported by ``.ci/run``) or selecting them with ``-m slow`` runs the full form
(1,000+ fuzzed cases, a 5-minute soak, 10 worker kills). Sizes are counts and durations of the load,
never time limits on a result: no test here asserts how fast anything was.

Processes
---------
``ServerProcess`` starts ``service.api.server.run`` (what ``tikhon serve`` calls) in a fresh interpreter
on a free loopback port, with its settings passed as ``TIKHON_*`` environment variables, and keeps its
log (stderr, JSON lines) in a file. ``WorkerProcess`` does the same for ``service.worker.run_worker``
(what ``tikhon worker`` calls). Both can be SIGKILLed. Every address used is 127.0.0.1.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import httpx
import numpy as np
import pytest
import sqlalchemy as sa

REPO = Path(__file__).resolve().parents[2]
LOOPBACK = "127.0.0.1"

# Small but real training spec over the demo scenario's numeric inputs: 2 basis settings x 8 strengths x
# 4 folds. Quick enough to train dozens of times in a test run.
QUICK_SPEC = {
    "target": "energy_kwh",
    "features": ["flow_lps", "head_m"],
    "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2]}],
    "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e2, "count": 8}},
    "cv": {"scheme": "kfold", "folds": 4, "seed": 3},
}

# A slower spec (RBF bases over many centers): a training job that lasts long enough to be killed
# at a random moment inside it.
SLOW_SPEC = {
    "target": "energy_kwh",
    "features": ["flow_lps", "head_m"],
    "bases": [{"kind": "polynomial", "degrees": [2, 3, 4]},
              {"kind": "rbf", "widths": [0.5, 1.0, 2.0, 4.0], "centers": 120}],
    "penalty": {"kind": "l2", "strengths": {"min": 1e-4, "max": 1e3, "count": 25}},
    "cv": {"scheme": "kfold", "folds": 5, "seed": 5},
}


def full_run(config) -> bool:
    """Full size under TIKHON_CI_FULL=1, or when the slow tests were selected explicitly (-m slow)."""
    if os.environ.get("TIKHON_CI_FULL", "") not in ("", "0"):
        return True
    return "slow" in (config.getoption("-m", default="") or "") and "not slow" not in config.getoption("-m")


@pytest.fixture(scope="session")
def full(request) -> bool:
    return full_run(request.config)


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return s.getsockname()[1]


def demo_rows(n: int, seed: int, month: int = 0) -> dict[str, np.ndarray]:
    """Numeric columns of the invented pump-station scenario (service.demo), seeded."""
    from service.demo import pump_stations

    d = pump_stations(n, seed=seed, month=month)
    return {k: d[k] for k in ("flow_lps", "head_m", "energy_kwh")}


def as_rows(cols: dict[str, np.ndarray]) -> list[dict[str, float]]:
    names = list(cols)
    return [dict(zip(names, vals)) for vals in zip(*(cols[k].tolist() for k in names))]


def csv_text(cols: dict[str, np.ndarray]) -> str:
    names = list(cols)
    lines = [",".join(names)] + [",".join(repr(v) for v in vals) for vals in zip(*(cols[k].tolist() for k in names))]
    return "\n".join(lines) + "\n"


def settings_env(settings: dict[str, Any]) -> dict[str, str]:
    """``TIKHON_*`` variables for a child process (pydantic-settings reads lists as JSON)."""
    import json

    env = {k: v for k, v in os.environ.items() if not k.startswith("TIKHON_") or k == "TIKHON_CI_FULL"}
    env["PYTHONPATH"] = str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")
    for key, value in settings.items():
        env[f"TIKHON_{key.upper()}"] = json.dumps(value) if isinstance(value, (list, dict)) else str(value)
    return env


def base_settings(root: Path, **over: Any) -> dict[str, Any]:
    (root / "data").mkdir(parents=True, exist_ok=True)
    out: dict[str, Any] = dict(store=str(root / "store"), data_dir=str(root / "data"), worker_heartbeat_s=0.2,
                               worker_poll_s=0.05, worker_stale_s=30.0, cancel_grace_s=5.0, auth_cache_s=0.0,
                               live_cache_s=0.0, log_level="info", host=LOOPBACK)
    out.update(over)
    return out


class _Child:
    """A Python child process running ``code`` with ``settings`` in its environment; stderr kept in a file."""

    code = ""

    def __init__(self, settings: dict[str, Any], log_path: Path, *, prelude: str = "", env: dict | None = None):
        """``prelude``: Python run before the entry point (a test's fault hook); ``env``: extra variables."""
        self.settings = settings
        self.log_path = log_path
        self._log = open(log_path, "ab")
        self.proc = subprocess.Popen([sys.executable, "-c", prelude + "\n" + self.code],
                                     env={**settings_env(settings), **(env or {})}, cwd=str(REPO),
                                     stdout=self._log, stderr=subprocess.STDOUT, start_new_session=True)

    @property
    def pid(self) -> int:
        return self.proc.pid

    def alive(self) -> bool:
        return self.proc.poll() is None

    def kill(self, group: bool = True) -> None:
        """SIGKILL the process; with ``group``, also the processes it started (its training children)."""
        with contextlib.suppress(ProcessLookupError):
            if group:
                os.killpg(self.proc.pid, signal.SIGKILL)
            else:
                os.kill(self.proc.pid, signal.SIGKILL)
        self.proc.wait(30)

    def stop(self) -> None:
        if self.alive():
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(30)
            except subprocess.TimeoutExpired:
                self.kill()
        with contextlib.suppress(ProcessLookupError):
            os.killpg(self.proc.pid, signal.SIGKILL)  # training children left behind, if any
        self._log.close()

    def log_text(self) -> str:
        self._log.flush()
        return self.log_path.read_text(errors="replace")

    def rss_bytes(self) -> int:
        """Resident set size of the process itself, from /proc (Linux)."""
        for line in Path(f"/proc/{self.pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
        raise RuntimeError("no VmRSS in /proc status")


class ServerProcess(_Child):
    code = ("from service.settings import Settings\n"
            "from service.api.server import run\n"
            "run(Settings())\n")

    def __init__(self, settings: dict[str, Any], log_path: Path, **kw: Any):
        settings = {**settings, "port": settings.get("port") or free_port()}
        super().__init__(settings, log_path, **kw)
        self.base = f"http://{LOOPBACK}:{settings['port']}"

    def wait_ready(self, deadline_s: float = 90.0) -> "ServerProcess":
        """Wait until /healthz answers (a start-up wait; it fails only if the server never comes up)."""
        end = time.monotonic() + deadline_s
        while True:
            if not self.alive():
                raise AssertionError(f"server exited with {self.proc.returncode}:\n{self.log_text()[-3000:]}")
            try:
                if httpx.get(f"{self.base}/healthz", timeout=2).status_code == 200:
                    return self
            except httpx.TransportError:
                pass
            if time.monotonic() > end:
                raise AssertionError(f"server did not start:\n{self.log_text()[-3000:]}")
            time.sleep(0.05)


class WorkerProcess(_Child):
    code = ("from service.settings import Settings\n"
            "from service.worker import run_worker\n"
            "run_worker(Settings())\n")


@contextlib.contextmanager
def server_process(root: Path, **over: Any):
    settings = base_settings(root, **over)
    srv = ServerProcess(settings, root / f"server-{time.monotonic_ns()}.log")
    try:
        yield srv.wait_ready()
    finally:
        srv.stop()


def open_store(settings: dict[str, Any], **kw):
    from service.settings import Settings
    from service.store import Store

    return Store(Settings(**{k: v for k, v in settings.items()}), **kw)


def publish_demo(store, name: str = "pumps", *, n: int = 400, seed: int = 0, live: bool = True, spec=None) -> dict:
    """Train QUICK_SPEC on demo data with the engine and publish it through the store (no worker needed)."""
    from service.engine import tune

    result = tune(demo_rows(n, seed), spec or QUICK_SPEC)
    body, arrays = result.to_artifact()
    row = store.publish(name, body, arrays)
    if live:
        store.set_live(name, row["version"], actor="test", reason="reliability fixture")
    return row


# ----------------------------------------------------------------------------------------------------
# store snapshots: "nothing was written"

_CATALOG_TABLES = ("models", "versions", "history", "jobs", "api_keys")


def store_snapshot(store_root: Path, catalog_url: str) -> dict[str, Any]:
    """Every file under the store (path, size, SHA-256) except the SQLite files themselves, plus every row
    of every catalog table. Two equal snapshots mean nothing was written to the store."""
    files = {}
    root = Path(store_root)
    for p in sorted(root.rglob("*")):
        rel = p.relative_to(root).as_posix()
        if rel.startswith("catalog.db"):
            continue
        if p.is_file():
            files[rel] = (p.stat().st_size, hashlib.sha256(p.read_bytes()).hexdigest())
        elif p.is_dir():
            files[rel] = "dir"
    engine = sa.create_engine(catalog_url)
    rows = {}
    try:
        with engine.connect() as conn:
            for table in _CATALOG_TABLES:
                rows[table] = sorted(repr(tuple(r)) for r in conn.execute(sa.text(f"SELECT * FROM {table}")))
    finally:
        engine.dispose()
    return {"files": files, "catalog": rows}


def catalog_url_of(settings: dict[str, Any]) -> str:
    return settings.get("database_url") or f"sqlite:///{(Path(settings['store']) / 'catalog.db').resolve()}"


def assert_problem(r: httpx.Response, *statuses: int) -> dict:
    """An RFC 9457 problem with one of ``statuses``: media type, members of section 3.1, no traceback."""
    assert r.status_code in statuses, (r.status_code, r.text[:2000])
    assert r.headers.get("content-type", "").split(";")[0] == "application/problem+json", r.headers
    body = r.json()
    # RFC 9457 section 3.1: type, title, status, detail (and the status member equals the HTTP status).
    assert body["status"] == r.status_code
    assert body["type"].startswith("/problems/") and body["title"] and body["detail"], body
    assert "Traceback" not in r.text and 'File "' not in r.text
    return body


@pytest.fixture(scope="session")
def rk():
    """The helpers above, for test modules (which cannot import this conftest in importlib mode)."""
    return SimpleNamespace(
        QUICK_SPEC=QUICK_SPEC, SLOW_SPEC=SLOW_SPEC, demo_rows=demo_rows, as_rows=as_rows, csv_text=csv_text,
        base_settings=base_settings, ServerProcess=ServerProcess, WorkerProcess=WorkerProcess,
        server_process=server_process, open_store=open_store, publish_demo=publish_demo,
        store_snapshot=store_snapshot, catalog_url_of=catalog_url_of, assert_problem=assert_problem,
        free_port=free_port, settings_env=settings_env, REPO=REPO, LOOPBACK=LOOPBACK,
    )
