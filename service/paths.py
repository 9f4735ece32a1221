"""Paths as callers may see them: relative to the data folder or the store, never absolute.

A problem detail, a readiness answer or a failed job's record must not tell a caller where the server
keeps its files (the absolute paths of ``TIKHON_DATA_DIR`` and ``TIKHON_STORE`` say who runs it and
how the machine is laid out). Two helpers, used wherever a message carries a path:

* ``shown(path, root)`` formats one path the code knows, relative to ``root`` (``"pumps/2024-06.csv"``),
  or only its last component when it lies outside ``root``.
* ``redact(text)`` is the safety net at the HTTP boundary (``service.problems``): every absolute
  form of a registered root inside free text (an OS or pyarrow message quoting a full path, say) becomes
  its label, ``<TIKHON_DATA_DIR>`` or ``<TIKHON_STORE>``. Roots are registered per process with
  ``register(settings)`` when an app or a worker starts; registering more roots only redacts more.

Standard library only (layer 0).
"""

from __future__ import annotations

import os
import re
import threading
from pathlib import Path, PurePath
from typing import Any

_lock = threading.Lock()
_roots: dict[str, str] = {}  # absolute path -> label
_pattern: re.Pattern[str] | None = None


def _forms(path: Any) -> set[str]:
    out = set()
    raw = os.fspath(path)
    if not raw:
        return out
    out.add(os.path.abspath(raw))
    try:
        out.add(str(Path(raw).resolve()))
    except (OSError, RuntimeError):  # a loop or an unreadable component: keep the plain absolute form
        pass
    return {p.rstrip("/") for p in out if len(p.rstrip("/")) > 1}  # never "/" itself


def add_root(path: Any, label: str) -> None:
    """Redact ``path`` (in every absolute spelling) as ``<label>`` from now on in this process."""
    global _pattern
    with _lock:
        for form in _forms(path):
            _roots.setdefault(form, label)
        # longest first, so a root inside another root keeps its own label; a root only matches whole
        # path components ("/srv/store" does not match inside "/srv/store2")
        alternatives = "|".join(re.escape(p) for p in sorted(_roots, key=len, reverse=True))
        _pattern = re.compile(f"(?:{alternatives})(?=/|\\\\|$|[^\\w.-])") if alternatives else None


def register(settings: Any) -> None:
    """Register the data folder, the store and a SQLite catalog file of ``settings``."""
    add_root(settings.data_dir, "TIKHON_DATA_DIR")
    add_root(settings.store, "TIKHON_STORE")
    url = str(getattr(settings, "database_url", None) or "")
    if url.startswith("sqlite:///") and len(url) > len("sqlite:///"):
        add_root(Path(url[len("sqlite:///"):]).parent, "catalog folder")


def redact(text: Any) -> Any:
    """``text`` with every registered root replaced by its label; non-strings come back unchanged."""
    pattern = _pattern
    if not isinstance(text, str) or pattern is None:
        return text
    return pattern.sub(lambda m: f"<{_roots.get(m.group(0), 'folder')}>", text)


def redact_all(value: Any) -> Any:
    """``redact`` applied to every string inside lists and dicts (a problem's ``errors`` list, say)."""
    if isinstance(value, str):
        return redact(value)
    if isinstance(value, dict):
        return {k: redact_all(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [redact_all(v) for v in value]
    return value


def shown(path: Any, root: Any) -> str:
    """``path`` relative to ``root`` as a POSIX string ("." for the root itself); only the last component
    when ``path`` lies outside ``root``. Neither argument needs to exist."""
    p = PurePath(os.path.abspath(os.fspath(path)))
    for base in (PurePath(os.path.abspath(os.fspath(root))), _resolved(root)):
        if base is None:
            continue
        try:
            rel = p.relative_to(base)
        except ValueError:
            continue
        return rel.as_posix() or "."
    return p.name or "."


def _resolved(root: Any) -> PurePath | None:
    try:
        return PurePath(Path(os.fspath(root)).resolve())
    except (OSError, RuntimeError):
        return None
