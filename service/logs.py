"""Structured JSON logs, one object per line on stderr.

``configure(settings)`` is called by the serve and worker entry points (never at import time). Every
record carries ``ts``, ``level``, ``logger`` and ``msg`` plus whatever the caller put in ``extra``
(request id, route, status, job id...). Secrets are never passed to the logger; as a second line of
defence any field whose name mentions a key, secret, token or authorization is dropped.
"""

from __future__ import annotations

import asyncio
import functools
import logging
import os
import re
import sys
import threading
import time
import weakref

import orjson

_STANDARD = set(vars(logging.LogRecord("x", 0, "", 0, "", None, None))) | {"message", "asctime", "taskName"}
_SECRETISH = ("authorization", "secret", "token", "api_key", "apikey", "password")
# uvicorn adds a coloured copy of its messages ("color_message"); a JSON log carries plain text only, and
# any terminal escape sequence (ECMA-48 CSI) left in a message is removed.
_DROP = frozenset({"color_message"})
_ANSI = re.compile(r"\x1b\[[0-9;?]*[ -/]*[@-~]")


def _plain(value):
    return _ANSI.sub("", value) if isinstance(value, str) and "\x1b" in value else value


@functools.lru_cache(maxsize=1024)
def _secretish(key: str) -> bool:
    lowered = key.lower()
    return any(s in lowered for s in _SECRETISH)


class JsonFormatter(logging.Formatter):
    _second: tuple[int, str] = (-1, "")  # the last whole second formatted, and its text

    def _timestamp(self, created: float, msecs: float) -> str:
        second = int(created)
        if self._second[0] != second:
            self._second = (second, time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(created)))
        return f"{self._second[1]}.{int(msecs):03d}Z"

    def format(self, record: logging.LogRecord) -> str:
        out = {
            "ts": self._timestamp(record.created, record.msecs),
            "level": record.levelname.lower(),
            "logger": record.name,
            "msg": _plain(record.getMessage()),
        }
        for key, value in record.__dict__.items():
            if key in _STANDARD or key in _DROP or key.startswith("_") or _secretish(key):
                continue
            out[key] = _plain(value)
        if record.exc_info:
            out["exc"] = self.formatException(record.exc_info)
        return orjson.dumps(out, default=str).decode()


HOLD_BYTES = 64 * 1024  # held access lines are written at once when they reach this size


class LineHandler(logging.StreamHandler):
    """The JSON lines handler. With ``hold_s`` > 0, the access log's lines (``line``) are held and written
    together: when ``hold_s`` seconds have passed since the first one held (a timer of the event loop when the
    line comes from its thread, as the request context's do, so no other thread competes for the interpreter
    lock on every batch; else a background thread of the handler), when they
    reach ``HOLD_BYTES``, before any other record (so lines keep their order), and at ``flush`` (which
    ``logging.shutdown`` calls when the process exits). A process killed outright loses what it held."""

    def __init__(self, stream=None, hold_s: float = 0.0) -> None:
        super().__init__(stream)
        self.hold_s = float(hold_s)
        self._held: list[bytes] = []
        self._held_bytes = 0
        self._due = threading.Event()
        self._thread: threading.Thread | None = None
        me = weakref.ref(self)  # a child never writes its parent's held lines
        os.register_at_fork(after_in_child=lambda: (h := me()) is not None and h._forget())

    def _forget(self) -> None:
        self._held = []
        self._held_bytes = 0
        self._due = threading.Event()
        self._thread = None

    def hold(self, data: bytes) -> None:
        """Hold one line (bytes ending with the terminator) for a later write."""
        self.acquire()
        try:
            self._held.append(data)
            self._held_bytes += len(data)
            if self._held_bytes >= HOLD_BYTES:
                self._write_held()
            elif len(self._held) == 1:  # a new batch: its write is due hold_s from now
                try:
                    loop = asyncio.get_running_loop()
                except RuntimeError:
                    loop = None
                if loop is not None:  # on the event loop's thread (the request context): a timer of the loop
                    loop.call_later(self.hold_s, self.write_held)
                else:  # any other thread: the handler's own thread writes it
                    if self._thread is None:
                        self._thread = threading.Thread(target=self._run, name="tikhon-log", daemon=True)
                        self._thread.start()
                    self._due.set()
        finally:
            self.release()

    def _run(self) -> None:
        due = self._due
        while True:
            due.wait()
            time.sleep(self.hold_s)
            due.clear()
            self.write_held()

    def write_held(self) -> None:
        """Write the held lines now (a stream that fails is reported through ``handleError``; nothing raises)."""
        self.acquire()
        try:
            self._write_held()
        finally:
            self.release()

    def _write_held(self) -> None:
        """Write the held lines (the handler's lock is held)."""
        if not self._held:
            return
        data = b"".join(self._held)
        self._held.clear()
        self._held_bytes = 0
        try:
            write_bytes(self.stream, data)
        except Exception:  # a closed or broken stream: reported as logging reports a record it cannot write
            lost = data.count(b"\n")
            self.handleError(logging.makeLogRecord({"msg": f"{lost} access log line(s) not written"}))

    def emit(self, record: logging.LogRecord) -> None:
        if self._held:  # called with the lock held (Handler.handle)
            self._write_held()
        super().emit(record)

    def flush(self) -> None:
        self.write_held()
        super().flush()


def write_bytes(stream, data: bytes) -> None:
    """Write UTF-8 ``data`` to a text ``stream`` and flush it: to its binary buffer when it has one and
    encodes as UTF-8 (after flushing the text layer, so earlier text goes first), else as text."""
    raw = getattr(stream, "buffer", None)
    if raw is None or (getattr(stream, "encoding", "") or "").lower().replace("-", "").replace("_", "") != "utf8":
        stream.write(data.decode())
    else:
        stream.flush()
        raw.write(data)
    stream.flush()


def configure(level: str = "info", stream=None, *, hold_s: float = 0.0) -> None:
    """JSON lines at ``level`` on ``stream`` (stderr) for Tikhon's and uvicorn's loggers. ``hold_s``: how long
    the access log's lines may be held to be written together (``LineHandler``; settings.access_log_hold_s)."""
    # The JSON lines never carry the caller's file, line, thread or process (they are dropped as standard
    # attributes), so the logging module need not look them up for every record: these are the switches
    # its documentation gives for that ("Optimization" in the logging HOWTO).
    logging._srcfile = None
    logging.logThreads = False
    logging.logProcesses = False
    logging.logMultiprocessing = False
    handler = LineHandler(stream or sys.stderr, hold_s=hold_s)
    handler.setFormatter(JsonFormatter())
    for name in ("tikhon", "uvicorn", "uvicorn.error"):
        logger = logging.getLogger(name)
        for old in logger.handlers:  # lines an earlier configuration still holds are written, not dropped
            if isinstance(old, LineHandler) and old is not handler:
                old.write_held()
        logger.handlers[:] = [handler]
        logger.propagate = False
        logger.setLevel(level.upper())
    # uvicorn's own access log duplicates ours (ours has the request id and route); keep it quiet.
    logging.getLogger("uvicorn.access").disabled = True


def _direct_handler(logger: logging.Logger, level: int) -> logging.StreamHandler | None:
    """The one JSON handler ``configure`` gave ``logger`` when a record at ``level`` would go to it and to
    nothing else (no filters, no other handler, the standard record factory); else None."""
    handlers: list[logging.Handler] = []
    current: logging.Logger | None = logger
    while current is not None:  # the handlers logging.Logger.callHandlers would visit
        if current.disabled or current.filters:
            return None
        handlers.extend(current.handlers)
        current = current.parent if current.propagate else None
    if len(handlers) != 1:
        return None
    handler = handlers[0]
    if (type(handler) not in (logging.StreamHandler, LineHandler) or type(handler.formatter) is not JsonFormatter or handler.filters
            or level < handler.level or logging.getLogRecordFactory() is not logging.LogRecord):
        return None
    return handler


@functools.lru_cache(maxsize=64)
def _fixed(level: int, name: str, msg: str) -> bytes:
    """The part of a direct line after its time stamp: ``,"level":...,"logger":...,"msg":...`` (no brace)."""
    return orjson.dumps({"level": logging.getLevelName(level).lower(), "logger": name, "msg": _plain(msg)})[1:-1]


def line(logger: logging.Logger, level: int, msg: str, fields: dict) -> None:
    """``logger.log(level, msg, extra=fields)`` for the access log of every request, writing the same JSON
    line without building a ``LogRecord`` when the logger is set up as ``configure`` leaves it (one
    ``JsonFormatter`` stream handler, no filters); otherwise through ``logging`` as usual. ``fields``
    holds plain values under names that are neither standard record attributes nor secret-like.

    The line is made as bytes: the fixed part (level, logger, message) is serialized once per kind of line
    and the fields in one ``orjson`` call. It is held for a later write with others (``LineHandler`` with
    ``hold_s`` > 0), or written at once to the stream's binary buffer (the text layer is flushed first, so
    lines written through ``logging`` keep their order)."""
    if not logger.isEnabledFor(level):
        return
    handler = _direct_handler(logger, level)
    if handler is None:
        logger.log(level, msg, extra=fields)
        return
    created = time.time()
    stamp = handler.formatter._timestamp(created, int((created - int(created)) * 1000))
    values = {k: (_ANSI.sub("", v) if v.__class__ is str and "\x1b" in v else v) for k, v in fields.items()}
    body = orjson.dumps(values, default=str)
    data = b"".join((b'{"ts":"', stamp.encode(), b'",', _fixed(level, logger.name, msg),
                     b"," if len(body) > 2 else b"", body[1:], handler.terminator.encode()))
    if type(handler) is LineHandler and handler.hold_s > 0:
        handler.hold(data)
        return
    handler.acquire()
    try:
        write_bytes(handler.stream, data)
    except Exception:  # a closed or broken stream: let logging report it as it would for any record
        handler.release()
        logger.log(level, msg, extra=fields)
        return
    handler.release()
