"""The JSON log's held access lines (``service.logs.LineHandler`` with ``hold_s`` > 0): every line is written
once, in order, within the hold; other records write the held lines first; nothing held is lost at a flush, a
new configuration or a process exit; a forked child never writes its parent's held lines."""

from __future__ import annotations

import io
import json
import logging
import os
import subprocess
import sys
import time

import pytest

from service import logs

ACCESS = logging.getLogger("tikhon.api.access")


@pytest.fixture
def held():
    buf = io.StringIO()
    logs.configure("info", stream=buf, hold_s=0.2)
    try:
        yield buf
    finally:
        logs.configure("warning")


def _lines(buf: io.StringIO) -> list[dict]:
    return [json.loads(x) for x in buf.getvalue().splitlines()]


def test_held_lines_are_written_together_within_the_hold(held):
    for i in range(3):
        logs.line(ACCESS, logging.INFO, "request", {"n": i})
    assert held.getvalue() == ""  # held, not yet written
    deadline = time.monotonic() + 5
    while not held.getvalue() and time.monotonic() < deadline:
        time.sleep(0.02)
    assert [e["n"] for e in _lines(held)] == [0, 1, 2]
    assert all(e["logger"] == "tikhon.api.access" and e["msg"] == "request" for e in _lines(held))


def test_another_record_writes_the_held_lines_first(held):
    logs.line(ACCESS, logging.INFO, "request", {"n": 1})
    logging.getLogger("tikhon.api").warning("something to say", extra={"n": 2})
    assert [(e["level"], e["n"]) for e in _lines(held)] == [("info", 1), ("warning", 2)]


def test_a_flush_or_a_new_configuration_writes_what_is_held(held):
    logs.line(ACCESS, logging.INFO, "request", {"n": 1})
    for handler in logging.getLogger("tikhon").handlers:
        handler.flush()
    assert [e["n"] for e in _lines(held)] == [1]
    logs.line(ACCESS, logging.INFO, "request", {"n": 2})
    logs.configure("info", stream=io.StringIO())  # the old handler's held line goes to its own stream
    assert [e["n"] for e in _lines(held)] == [1, 2]


def test_lines_past_the_size_bound_are_written_at_once(held):
    field = "x" * 1000
    count = logs.HOLD_BYTES // 1000 + 2
    for i in range(count):
        logs.line(ACCESS, logging.INFO, "request", {"n": i, "pad": field})
    written = _lines(held)
    assert written and [e["n"] for e in written] == list(range(len(written)))  # a prefix, in order
    assert len(written) < count  # the rest is still held


def test_held_lines_are_written_when_the_process_exits(tmp_path):
    out = tmp_path / "log.txt"
    code = (
        "import logging, sys\n"
        "from service import logs\n"
        f"f = open({str(out)!r}, 'w')\n"
        "logs.configure('info', stream=f, hold_s=5)\n"
        "for i in range(100):\n"
        "    logs.line(logging.getLogger('tikhon.api.access'), logging.INFO, 'request', {'n': i})\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True, timeout=60, env={**os.environ, "PYTHONPATH": os.getcwd()})
    assert [json.loads(x)["n"] for x in out.read_text().splitlines()] == list(range(100))


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork")
def test_a_forked_child_never_writes_its_parents_held_lines(tmp_path):
    out = tmp_path / "log.txt"
    code = (
        "import logging, os\n"
        "from service import logs\n"
        f"f = open({str(out)!r}, 'w')\n"
        "logs.configure('info', stream=f, hold_s=5)\n"
        "access = logging.getLogger('tikhon.api.access')\n"
        "logs.line(access, logging.INFO, 'request', {'who': 'parent'})\n"
        "pid = os.fork()\n"
        "if pid == 0:\n"
        "    logs.line(access, logging.INFO, 'request', {'who': 'child'})\n"
        "    logging.shutdown()\n"
        "    os._exit(0)\n"
        "os.waitpid(pid, 0)\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True, timeout=60, env={**os.environ, "PYTHONPATH": os.getcwd()})
    assert sorted(json.loads(x)["who"] for x in out.read_text().splitlines()) == ["child", "parent"]


def test_without_a_hold_each_line_is_written_at_once():
    buf = io.StringIO()
    logs.configure("info", stream=buf)  # hold_s defaults to 0
    try:
        logs.line(ACCESS, logging.INFO, "request", {"n": 1})
        assert [e["n"] for e in _lines(buf)] == [1]
    finally:
        logs.configure("warning")


def test_lines_held_on_an_event_loop_are_written_by_its_timer(held):
    import asyncio

    async def serve():
        for i in range(3):
            logs.line(ACCESS, logging.INFO, "request", {"n": i})
        assert held.getvalue() == ""
        await asyncio.sleep(0.5)  # the hold is 0.2 s
        return [e["n"] for e in _lines(held)]

    assert asyncio.run(serve()) == [0, 1, 2]
    (handler,) = logging.getLogger("tikhon").handlers
    assert handler._thread is None  # no thread of its own was needed


def test_a_new_configuration_after_the_old_stream_was_closed_does_not_raise(tmp_path, capsys):
    f = open(tmp_path / "old.log", "w")
    logs.configure("info", stream=f, hold_s=5)
    try:
        logs.line(ACCESS, logging.INFO, "request", {"n": 1})
        f.close()  # the old stream is gone with a line still held
        buf = io.StringIO()
        logs.configure("info", stream=buf)  # reported as logging reports a record it cannot write; no exception
        logs.line(ACCESS, logging.INFO, "request", {"n": 2})
        assert [e["n"] for e in _lines(buf)] == [2]
        assert "access log line(s) not written" in capsys.readouterr().err
    finally:
        logs.configure("warning")
