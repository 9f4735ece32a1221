"""Structured JSON logs, one object per line on stderr.

``configure(settings)`` is called by the serve and worker entry points (never at import time). Every
record carries ``ts``, ``level``, ``logger`` and ``msg`` plus whatever the caller put in ``extra``
(request id, route, status, job id...). Secrets are never passed to the logger; as a second line of
defence any field whose name mentions a key, secret, token or authorization is dropped.
"""

from __future__ import annotations

import functools
import logging
import re
import sys
import time

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


def configure(level: str = "info", stream=None) -> None:
    # The JSON lines never carry the caller's file, line, thread or process (they are dropped as standard
    # attributes), so the logging module need not look them up for every record: these are the switches
    # its documentation gives for that ("Optimization" in the logging HOWTO).
    logging._srcfile = None
    logging.logThreads = False
    logging.logProcesses = False
    logging.logMultiprocessing = False
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonFormatter())
    for name in ("tikhon", "uvicorn", "uvicorn.error"):
        logger = logging.getLogger(name)
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
    if (type(handler) is not logging.StreamHandler or type(handler.formatter) is not JsonFormatter or handler.filters
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

    The line is written as bytes: the fixed part (level, logger, message) is serialized once per kind of
    line, the fields in one ``orjson`` call, and the bytes go to the stream's binary buffer (the text layer
    is flushed first, so lines written through ``logging`` keep their order), one ``write`` per line."""
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
    stream = handler.stream
    handler.acquire()
    try:
        raw = getattr(stream, "buffer", None)
        if raw is None or getattr(stream, "encoding", "").lower().replace("-", "") not in ("utf8",):
            stream.write(data.decode())
        else:
            stream.flush()  # anything the text layer holds goes first
            raw.write(data)
        stream.flush()
    except Exception:  # a closed or broken stream: let logging report it as it would for any record
        handler.release()
        logger.log(level, msg, extra=fields)
        return
    handler.release()
