"""Structured JSON logs, one object per line on stderr.

``configure(settings)`` is called by the serve and worker entry points (never at import time). Every
record carries ``ts``, ``level``, ``logger`` and ``msg`` plus whatever the caller put in ``extra``
(request id, route, status, job id...). Secrets are never passed to the logger; as a second line of
defence any field whose name mentions a key, secret, token or authorization is dropped.
"""

from __future__ import annotations

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


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        out = {
            "ts": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created)) + f".{int(record.msecs):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "msg": _plain(record.getMessage()),
        }
        for key, value in record.__dict__.items():
            if key in _STANDARD or key in _DROP or key.startswith("_"):
                continue
            if any(s in key.lower() for s in _SECRETISH):
                continue
            out[key] = _plain(value)
        if record.exc_info:
            out["exc"] = self.formatException(record.exc_info)
        return orjson.dumps(out, default=str).decode()


def configure(level: str = "info", stream=None) -> None:
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(JsonFormatter())
    for name in ("tikhon", "uvicorn", "uvicorn.error"):
        logger = logging.getLogger(name)
        logger.handlers[:] = [handler]
        logger.propagate = False
        logger.setLevel(level.upper())
    # uvicorn's own access log duplicates ours (ours has the request id and route); keep it quiet.
    logging.getLogger("uvicorn.access").disabled = True
