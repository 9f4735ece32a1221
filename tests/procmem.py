"""A process's memory, read from /proc (Linux, proc(5)): for the tests that bound what one request costs."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable


def status(pid: int, field: str) -> int:
    """A ``/proc/PID/status`` memory field (``VmRSS``, ``VmHWM``, ...) in bytes."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) * 1024
    raise RuntimeError(f"no {field} in /proc/{pid}/status")


def peak_growth(pid: int, request: Callable[[], Any]) -> tuple[int, Any]:
    """(peak resident memory above the level before ``request()``, its response)."""
    Path(f"/proc/{pid}/clear_refs").write_text("5")  # reset VmHWM to the current RSS (proc(5))
    before = status(pid, "VmRSS")
    response = request()
    return status(pid, "VmHWM") - before, response
