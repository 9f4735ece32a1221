"""Several API processes on one listening socket: what ``tikhon serve --workers N`` runs for N >= 2.

One Python process answers HTTP on one core. To use the others, the supervisor (the process that
``tikhon serve`` started) binds the listening socket once and starts N API processes that inherit it;
the kernel hands each new connection to whichever process accepts it first, so no balancer and no
second port is needed, and a connection that one process did not accept stays queued for the others.

What the supervisor does::

    tikhon serve --workers N
      supervisor: checks access control and opens the catalog once (migrations), binds host:port,
      |           makes a private metrics folder, then watches
      +-- API process 0  (uvicorn on the shared socket; the embedded training worker, unless --no-worker)
      +-- API process 1  (uvicorn on the shared socket)
      +-- ...

* **Restart.** A process that exits while the server is not stopping (killed, crashed, or stopped on
  its own) is replaced, in the same slot: the training worker lives in slot 0 only, so there is exactly
  one embedded worker however many processes serve, and never two. A slot whose process keeps dying
  (before it got ready, or within ``_EARLY_S`` after) is restarted after a growing pause (0.5 s
  doubling to 30 s). A process that dies before it ever got ready during the first start stops the
  whole server with an error (a wrong setting would otherwise restart forever).
* **Stop.** On SIGTERM or SIGINT the supervisor sends SIGTERM to every process; each stops accepting,
  finishes its in-flight requests (up to ``TIKHON_SHUTDOWN_GRACE_S``), stops its worker and exits.
  A process still alive 10 s after the grace period is killed.
* **Caches.** Each process caches the live version (``TIKHON_LIVE_CACHE_S``), key checks
  (``TIKHON_AUTH_CACHE_S``) and catalog rows (the store's one-second cache) for itself. A change made
  through one process is seen by that process at once and by the others within those bounds, exactly
  as between replicas on several hosts.
* **Metrics.** prometheus_client's multiprocess mode: the children get ``PROMETHEUS_MULTIPROC_DIR``
  pointing at a private folder made for this server (and removed when it stops), and ``/metrics``
  sums the files of every process (``service.api.metrics``).
* **Which process answered.** Every response carries ``X-Tikhon-Process: <pid>``.
* **Parent gone.** A process whose supervisor disappeared (SIGKILL) stops by itself within a second.

Children are fresh interpreters (``subprocess`` with the socket passed as an inherited descriptor), not
forks: nothing (threads, database connections, locks) is copied from the supervisor.
"""

from __future__ import annotations

import json
import logging
import math
import os
import selectors
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass
from pathlib import Path

from service.errors import TikhonError
from service.settings import Settings

log = logging.getLogger("tikhon.api.supervisor")

_EARLY_S = 10.0  # a process that dies sooner than this after getting ready counts as a failed start
_KILL_AFTER_GRACE_S = 10.0
_LISTEN_BACKLOG = 2048  # the kernel's queue of connections not yet accepted by any process
_ACCEPT_BATCH = 1  # connections one process accepts per wake-up (see child_main)
_CHILD_CODE = "from service.api.supervisor import child_main; child_main()"


# ----------------------------------------------------------------------------------------------------
# how many processes


def usable_cores() -> int:
    """Cores this process may use: its CPU affinity, capped by a cgroup CPU quota (a container's ``--cpus``)."""
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not Linux
        cores = os.cpu_count() or 1
    quota = _cgroup_cpu_quota()
    if quota is not None:
        cores = min(cores, max(1, math.ceil(quota)))
    return max(1, cores)


def _cgroup_cpu_quota(proc_cgroup: Path = Path("/proc/self/cgroup"), root: Path = Path("/sys/fs/cgroup")) -> float | None:
    """The tightest CPU quota (in cores) over this process's cgroup and its parents, or None."""
    found: list[float] = []
    try:
        lines = proc_cgroup.read_text().splitlines()
    except OSError:
        return None
    for line in lines:
        hier, _, rest = line.partition(":")
        controllers, _, path = rest.partition(":")
        if hier == "0" and controllers == "":  # cgroup v2: cpu.max is "<quota|max> <period>"
            base = root
            parts = [p for p in path.split("/") if p]
            for depth in range(len(parts), -1, -1):
                try:
                    quota, period = (base.joinpath(*parts[:depth]) / "cpu.max").read_text().split()[:2]
                except (OSError, ValueError):
                    continue
                if quota != "max" and int(period) > 0:
                    found.append(int(quota) / int(period))
        elif "cpu" in controllers.split(","):  # cgroup v1 (as mounted in a container)
            for base in (root / "cpu,cpuacct", root / "cpu"):
                try:
                    quota = int((base / "cpu.cfs_quota_us").read_text())
                    period = int((base / "cpu.cfs_period_us").read_text())
                except (OSError, ValueError):
                    continue
                if quota > 0 and period > 0:
                    found.append(quota / period)
                break
    return min(found) if found else None


def process_count(workers: int | str) -> int:
    """``TIKHON_WORKERS`` as a number of API processes ('auto': ``usable_cores()``)."""
    return usable_cores() if workers == "auto" else int(workers)


# ----------------------------------------------------------------------------------------------------
# the supervisor


def _listen(host: str, port: int) -> socket.socket:
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    try:
        sock = socket.create_server((host.strip("[]"), port), family=family, backlog=_LISTEN_BACKLOG)
    except OSError as exc:
        raise TikhonError(f"cannot listen on {host}:{port}: {exc.strerror or exc}; choose another port "
                          "(--port / TIKHON_PORT) or stop what holds it.") from None
    sock.set_inheritable(True)
    return sock


@dataclass
class _Slot:
    index: int
    proc: subprocess.Popen | None = None
    ready_fd: int | None = None
    started: float = 0.0
    ready: bool = False
    ready_at: float = 0.0
    ever_ready: bool = False
    failures: int = 0
    next_start: float = 0.0


class Supervisor:
    """``Supervisor(settings, count).run()`` serves until SIGTERM/SIGINT; raises ``TikhonError`` when the
    processes cannot start."""

    def __init__(self, settings: Settings, count: int):
        if count < 1:
            raise ValueError("count must be at least 1")
        self.settings = settings
        self.count = count
        self.slots = [_Slot(i) for i in range(count)]
        self._stop = threading.Event()
        self._sock: socket.socket | None = None
        self._metrics_dir: str | None = None
        self._all_ready_once = False
        self._selector = selectors.DefaultSelector()

    # -- life cycle -----------------------------------------------------------------------------------
    def run(self) -> None:
        from service.logs import configure
        from service.api.server import check_bind
        from service.store import Store

        settings = self.settings
        configure(settings.log_level)
        store = Store(settings)  # migrations and the publish sweep run once, here, before any child opens it
        try:
            keys_exist = store.keys.any_active()
        finally:
            store.close()
        check_bind(settings.host, keys_exist)
        if not keys_exist:
            log.warning("no API key exists: routes are open, listening on loopback only",
                        extra={"host": settings.host, "port": settings.port})
        self._sock = _listen(settings.host, settings.port)
        self._metrics_dir = tempfile.mkdtemp(prefix="tikhon-metrics-")
        previous = {sig: signal.signal(sig, self._on_signal) for sig in (signal.SIGTERM, signal.SIGINT)}
        try:
            for slot in self.slots:
                self._start(slot)
            self._watch()
        finally:
            self._stop_all()
            self._sock.close()
            shutil.rmtree(self._metrics_dir, ignore_errors=True)
            for sig, handler in previous.items():
                signal.signal(sig, handler)

    def _on_signal(self, signum, frame) -> None:  # noqa: ARG002
        self._stop.set()

    def stop(self) -> None:
        """Ask ``run`` to stop (what SIGTERM does)."""
        self._stop.set()

    # -- children -------------------------------------------------------------------------------------
    def _start(self, slot: _Slot) -> None:
        settings = self.settings
        ready_r, ready_w = os.pipe()
        config = {
            "settings": settings.model_dump(mode="json"),
            "fd": self._sock.fileno(),
            "ready_fd": ready_w,
            "slot": slot.index,
            "worker": bool(settings.embedded_worker and slot.index == 0),
            "metrics_dir": self._metrics_dir,
            "parent": os.getpid(),
        }
        env = {**os.environ, "PROMETHEUS_MULTIPROC_DIR": self._metrics_dir}
        env.pop("prometheus_multiproc_dir", None)
        try:
            proc = subprocess.Popen([sys.executable, "-c", _CHILD_CODE], stdin=subprocess.PIPE, env=env,
                                    pass_fds=(self._sock.fileno(), ready_w))
        finally:
            os.close(ready_w)
        assert proc.stdin is not None
        try:
            proc.stdin.write(json.dumps(config).encode())
            proc.stdin.close()
        except BrokenPipeError:  # it died at once; _watch reaps it
            pass
        slot.proc, slot.ready_fd, slot.started, slot.ready = proc, ready_r, time.monotonic(), False
        self._selector.register(ready_r, selectors.EVENT_READ, slot)
        log.info("API process started", extra={"slot": slot.index, "pid": proc.pid, "training_worker": config["worker"]})

    def _close_ready(self, slot: _Slot) -> None:
        if slot.ready_fd is not None:
            self._selector.unregister(slot.ready_fd)
            os.close(slot.ready_fd)
            slot.ready_fd = None

    def _watch(self) -> None:
        while not self._stop.is_set():
            for key, _ in self._selector.select(timeout=0.2):
                slot: _Slot = key.data
                if os.read(key.fd, 16):
                    slot.ready = slot.ever_ready = True
                    slot.ready_at = time.monotonic()
                    log.info("API process ready", extra={"slot": slot.index, "pid": slot.proc.pid})
                self._close_ready(slot)
            if not self._all_ready_once and all(s.ready for s in self.slots):
                self._all_ready_once = True
                log.info("serving", extra={"host": self.settings.host, "port": self.settings.port,
                                           "processes": self.count,
                                           "pids": [s.proc.pid for s in self.slots if s.proc is not None]})
            now = time.monotonic()
            for slot in self.slots:
                if slot.proc is not None and slot.proc.poll() is not None:
                    self._reap(slot, now)
                if slot.proc is None and now >= slot.next_start and not self._stop.is_set():
                    self._start(slot)

    def _reap(self, slot: _Slot, now: float) -> None:
        proc = slot.proc
        assert proc is not None
        code = proc.returncode
        self._close_ready(slot)
        slot.proc = None
        how = f"signal {signal.Signals(-code).name}" if code < 0 else f"exit code {code}"
        if not self._all_ready_once and not slot.ever_ready:
            raise TikhonError(f"API process {slot.index} (pid {proc.pid}) ended with {how} before it was ready; "
                              "its log lines above say why. Nothing is serving.")
        uptime = now - slot.started
        early = not slot.ready or now - slot.ready_at < _EARLY_S
        slot.failures = slot.failures + 1 if early else 0
        pause = 0.0 if slot.failures == 0 else min(30.0, 0.5 * 2 ** (slot.failures - 1))
        slot.next_start = now + pause
        log.warning("API process ended; starting a replacement",
                    extra={"slot": slot.index, "pid": proc.pid, "ended_with": how, "uptime_s": round(uptime, 3),
                           "restart_in_s": pause})

    def _stop_all(self) -> None:
        running = [s for s in self.slots if s.proc is not None and s.proc.poll() is None]
        for slot in running:
            try:
                slot.proc.send_signal(signal.SIGTERM)
            except ProcessLookupError:
                pass
        deadline = time.monotonic() + self.settings.shutdown_grace_s + _KILL_AFTER_GRACE_S
        for slot in running:
            try:
                slot.proc.wait(max(0.0, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                log.error("API process did not stop within the grace period; killing it",
                          extra={"slot": slot.index, "pid": slot.proc.pid})
                slot.proc.kill()
                slot.proc.wait()
        for slot in self.slots:
            self._close_ready(slot)
        self._selector.close()
        log.info("stopped", extra={"processes": self.count})


# ----------------------------------------------------------------------------------------------------
# one API process


def _watch_parent(parent: int, server) -> None:
    while os.getppid() == parent:
        time.sleep(1.0)
    log.warning("the supervisor is gone; stopping", extra={"supervisor_pid": parent})
    server.should_exit = True


def child_main() -> None:
    """Entry point of one API process (its configuration arrives as JSON on stdin)."""
    import uvicorn

    from service.logs import configure
    from service.api.server import build

    cfg = json.loads(sys.stdin.buffer.read())
    settings = Settings(**cfg["settings"])
    configure(settings.log_level, hold_s=settings.access_log_hold_s)
    sock = socket.socket(fileno=cfg["fd"])
    ready_fd = cfg["ready_fd"]

    class _Server(uvicorn.Server):
        async def startup(self, sockets=None):
            await super().startup(sockets=sockets)
            if self.started:
                # asyncio set the shared queue to ``config.backlog`` (the accept batch, below); give the
                # kernel queue its full length back for every process.
                sock.listen(_LISTEN_BACKLOG)
                os.write(ready_fd, b"r")
                os.close(ready_fd)

    app, store, worker = build(settings, embedded_worker=cfg["worker"], multiprocess_dir=cfg["metrics_dir"],
                               process_header=True)
    # asyncio accepts up to ``backlog`` waiting connections per wake-up of the listening socket. With one
    # shared socket, the first process to wake would take a whole burst of new connections (a load
    # generator's or a proxy's pool opening at once) and keep them for their keep-alive life, leaving the
    # others idle. Accepting one connection per wake-up lets every woken process take its share, and a
    # busy process (slower to wake) takes fewer.
    from service.api.server import uvicorn_options

    options = {k: v for k, v in uvicorn_options(settings).items() if k not in ("host", "port")}
    config = uvicorn.Config(app, **options, backlog=_ACCEPT_BATCH)  # the socket is the supervisor's
    server = _Server(config)
    # Before uvicorn installs its own handlers (and after it restores these), a stop signal just asks the
    # server to stop: a SIGTERM that arrives while the process is still starting is not lost, and the one
    # uvicorn re-raises after its shutdown lets this process stop its worker, close the store and exit 0.
    def stop_requested(signum, frame):  # noqa: ARG001
        server.should_exit = True

    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, stop_requested)
    threading.Thread(target=_watch_parent, args=(cfg["parent"], server), daemon=True, name="supervisor-watch").start()
    if worker is not None:
        worker.start()
    try:
        server.run(sockets=[sock])
    finally:
        if worker is not None:
            worker.stop()
        store.close()
