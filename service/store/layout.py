"""Which folder is a store, and what in it the service may ever remove.

A store folder carries a marker file, ``.tikhon-store`` (JSON: ``{"format": "tikhon-store",
"format_version": 1, "created_at": ...}``), written when the service first takes the folder. The
service opens a folder as its store only when

* the folder is new or empty (the marker is written), or
* it holds the marker, or
* it holds nothing but what a Tikhon store holds (``.staging``, ``.trash``, ``.scratch``, ``_jobs``, the SQLite catalog
  files, this repository's ``README.md`` note, and model folders of version folders whose
  ``manifest.json`` says ``"format": "tikhon-model"``): a store written before markers existed; the
  marker is written then.

Any other folder is refused before anything in it is created, changed or removed
(``ForeignFolder``): pointing ``TIKHON_STORE`` at the wrong folder must never cost its files.

What the start-up sweep may remove is only what the service wrote and can prove unfinished:

* a staging folder ``.staging/<token>/`` whose lock file ``<token>.lock`` holds ``STAGING_MARK`` and is
  not locked by a living process;
* entries of ``.trash/`` named like the service names them (32 hex digits);
* a training job's scratch folder ``.scratch/<token>/`` under the proofs of ``service.store.scratch`` (a
  marked lock file no living process holds, a marker of the same token in the folder, and then only the
  files the scanned-column cache names);
* a version folder that holds a ``.publishing`` marker naming the catalog in use while that catalog
  has no row for it: a publish that crashed between its rename and its commit;
* a version folder that holds a ``.deleting`` marker naming the catalog in use while that catalog
  holds a tombstone for it: a deletion that crashed between its commit and its erase.

Everything else that the catalog does not list is kept and reported.
"""

from __future__ import annotations

import ctypes
import errno
import fcntl
import json
import os
import re
import uuid
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from service.errors import StorageFailure

STORE_MARKER = ".tikhon-store"
STORE_FORMAT = "tikhon-store"
STORE_FORMAT_VERSION = 1
STAGING_MARK = b"tikhon-staging 1\n"
PUBLISHING_MARKER = ".publishing"
DELETING_MARKER = ".deleting"
HEX_TOKEN = re.compile(r"[0-9a-f]{32}")

# The store's own top-level folders (model folders are named by the models): versions being written, versions
# being removed, training jobs' data (``<store>/_jobs/<id>/``) and training jobs' scratch folders (the
# scanned-column cache of a streamed job, ``service.store.scratch``). Named here only.
STAGING_DIR = ".staging"
TRASH_DIR = ".trash"
JOBS_DIR = "_jobs"
SCRATCH_DIR = ".scratch"

# Entries a store written before markers existed may hold at its top level (besides model folders).
_KNOWN_TOP = frozenset({STAGING_DIR, TRASH_DIR, JOBS_DIR, SCRATCH_DIR, "catalog.db", "catalog.db-wal", "catalog.db-shm",
                        "catalog.db-journal", "README.md"})


class ForeignFolder(StorageFailure):
    """The store folder holds files that Tikhon did not write; nothing in it was touched."""

    slug = "foreign-store-folder"
    title = "Store folder holds other files"


def relative(path: Path | str, root: Path | str) -> str:
    """``path`` relative to ``root`` when it lies inside it, else its base name: messages name paths
    without revealing where the store sits on the host."""
    try:
        return Path(path).resolve().relative_to(Path(root).resolve()).as_posix()
    except (ValueError, OSError):
        return Path(path).name


def _is_version_folder(path: Path) -> bool:
    try:
        with open(path / "manifest.json", "rb") as fh:
            head = fh.read(4096)
    except OSError:
        return False
    return b'"format"' in head and b'"tikhon-model"' in head


def _looks_like_model_folder(path: Path) -> bool:
    if not path.is_dir() or path.is_symlink():
        return False
    entries = list(path.iterdir())
    return bool(entries) and all(
        e.name.isdigit() and e.is_dir() and not e.is_symlink() and _is_version_folder(e) for e in entries)


def foreign_entries(root: Path) -> list[str]:
    """The top-level entries of an unmarked ``root`` that a Tikhon store would not hold (sorted)."""
    out = []
    for entry in sorted(root.iterdir()):
        if entry.name in _KNOWN_TOP or _looks_like_model_folder(entry):
            continue
        out.append(entry.name)
    return out


def claim(root: Path) -> str:
    """Make sure ``root`` is a store folder, creating it or writing its marker when that is safe.

    Returns what was found: ``"marked"`` (marker present), ``"new"`` (created or empty) or
    ``"adopted"`` (an unmarked store of an earlier release). Raises ``ForeignFolder`` (nothing touched)
    when ``root`` holds anything else, and ``StorageFailure`` when it cannot be created or read."""
    marker = root / STORE_MARKER
    try:
        if root.is_dir():
            if marker.is_file():
                _check_marker(marker)
                return "marked"
            foreign = foreign_entries(root)
            if foreign:
                shown = ", ".join(repr(n) for n in foreign[:5]) + (f" and {len(foreign) - 5} more" if len(foreign) > 5 else "")
                raise ForeignFolder(
                    f"the store folder {root.name!r} holds {len(foreign)} entr{'y' if len(foreign) == 1 else 'ies'} that "
                    f"Tikhon did not write ({shown}) and no {STORE_MARKER} marker, so it was left untouched; set "
                    "TIKHON_STORE to an empty folder or to an existing Tikhon store."
                )
            found = "adopted" if any(root.iterdir()) else "new"
        elif root.exists():
            raise ForeignFolder(f"the store path {root.name!r} is a file, not a folder; set TIKHON_STORE to a folder.")
        else:
            root.mkdir(parents=True)
            found = "new"
        body = {"format": STORE_FORMAT, "format_version": STORE_FORMAT_VERSION,
                "created_at": datetime.now(timezone.utc).isoformat()}
        tmp = root / f"{STORE_MARKER}.tmp"
        tmp.write_text(json.dumps(body) + "\n")
        os.replace(tmp, marker)
        return found
    except ForeignFolder:
        raise
    except OSError as exc:
        raise StorageFailure(
            f"the store folder {root.name!r} cannot be created or written ({exc.strerror or exc}); "
            "set TIKHON_STORE to a writable folder."
        ) from None


def _check_marker(marker: Path) -> None:
    try:
        body = json.loads(marker.read_text())
        ok = body.get("format") == STORE_FORMAT
        version = body.get("format_version")
    except (OSError, ValueError, AttributeError):
        ok, version = False, None
    if not ok:
        raise ForeignFolder(f"{STORE_MARKER} in the store folder is not a Tikhon store marker; the folder was left "
                            "untouched. Set TIKHON_STORE to an empty folder or to a Tikhon store.")
    if version not in (STORE_FORMAT_VERSION,):
        raise StorageFailure(f"the store folder was written by a newer Tikhon (store format {version!r}, this one "
                             f"reads {STORE_FORMAT_VERSION}); upgrade this one.")


def write_publishing_marker(folder: Path, catalog_id: str, token: str) -> None:
    """Mark ``folder`` as being published into the catalog ``catalog_id`` (removed after the commit)."""
    _write_marker(folder / PUBLISHING_MARKER, catalog_id, token)


def write_deleting_marker(folder: Path, catalog_id: str) -> None:
    """Mark a version folder as being deleted from the catalog ``catalog_id`` (before its tombstone commits)."""
    _write_marker(folder / DELETING_MARKER, catalog_id, "delete")


def _write_marker(path: Path, catalog_id: str, token: str) -> None:
    path.write_text(json.dumps({"catalog_id": catalog_id, "token": token}) + "\n")


def marker_catalog(folder: Path, marker: str) -> str | None:
    """The catalog id in ``folder``'s marker file ``marker``, or None when it has none (or a broken one)."""
    try:
        body: Any = json.loads((folder / marker).read_text())
    except (OSError, ValueError):
        return None
    value = body.get("catalog_id") if isinstance(body, dict) else None
    return value if isinstance(value, str) else None


def clear_markers(folder: Path) -> None:
    """Remove the publishing and deleting markers of a version folder the catalog lists as alive."""
    for marker in (PUBLISHING_MARKER, DELETING_MARKER):
        try:
            (folder / marker).unlink()
        except FileNotFoundError:
            pass


def new_held_lock(folder: Path, content: bytes, mode: int) -> tuple[str, int, Path]:
    """A new lock file ``<token>.lock`` in ``folder``, made exclusively (never through a link), locked with
    ``fcntl.flock(mode)`` (``LOCK_EX`` or ``LOCK_SH``) and starting with ``content``, the mark that proves to a
    later sweep that the folder named by the token is Tikhon's. Returns (token, open descriptor, path); the
    caller closes the descriptor to release it.

    Where the file system offers ``O_TMPFILE`` (Linux ext4, xfs, btrfs, tmpfs), the file is written, marked and
    locked while it has no name and then linked in: a process killed at any moment leaves either no file or a
    marked one, never an empty ``<token>.lock`` that a sweep would have to keep. Elsewhere the file is created
    by name, and a kill between its creation and its mark leaves an unmarked file that the sweep keeps and
    reports. A lock file a sweeper took for a dead one between its creation and the ``flock`` is left to it,
    and another token is drawn."""
    while True:
        token = uuid.uuid4().hex
        path = folder / f"{token}.lock"
        fd = _unnamed_held(folder, content, mode)
        if fd is not None:
            linked = _link_unnamed(fd, path)
            if linked:
                return token, fd, path
            os.close(fd)
            if linked is None:
                continue  # the name is taken: draw another token
        fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_RDWR | os.O_NOFOLLOW, 0o644)
        fcntl.flock(fd, mode)
        os.write(fd, content)
        try:
            ours = os.fstat(fd).st_ino == os.stat(path).st_ino
        except FileNotFoundError:  # a sweeper took it for a dead one between create and flock
            ours = False
        if ours:
            return token, fd, path
        os.close(fd)


# Whether unnamed files (O_TMPFILE) can be made and linked here; set to False at the first refusal, so that a file
# system without them costs one failed call per process, not one per lock.
try:
    _LIBC = ctypes.CDLL(None, use_errno=True)
    _TMPFILE_OK = [hasattr(os, "O_TMPFILE") and hasattr(_LIBC, "linkat")]
except OSError:  # no C library to load (not a glibc or musl system)
    _TMPFILE_OK = [False]


_AT_FDCWD = -100
_AT_SYMLINK_FOLLOW = 0x400
_AT_EMPTY_PATH = 0x1000


def _link_unnamed(fd: int, path: Path) -> bool | None:
    """Give the unnamed file open as ``fd`` the name ``path`` with ``linkat(2)``, which never replaces an
    existing name. True when linked; None when ``path`` exists; False otherwise: the file is then created by
    name, and where the refusal says linking unnamed files is not offered here, ``_TMPFILE_OK`` is cleared.

    ``linkat(fd, "", AT_FDCWD, path, AT_EMPTY_PATH)`` is tried first, then ``/proc/self/fd/<fd>`` with
    ``AT_SYMLINK_FOLLOW`` (the form open(2) documents for ``O_TMPFILE``; ``AT_EMPTY_PATH`` needed
    ``CAP_DAC_READ_SEARCH`` on older kernels). ``os.link`` with its defaults calls link(2) in CPython 3.11, which
    links the ``/proc`` symbolic link itself and fails with EXDEV (seen on this project's machines), hence the
    C call."""
    target = os.fsencode(path)
    refused = True
    for source, flags in ((b"", _AT_EMPTY_PATH), (f"/proc/self/fd/{fd}".encode(), _AT_SYMLINK_FOLLOW)):
        if _LIBC.linkat(fd if not source else _AT_FDCWD, source, _AT_FDCWD, target, flags) == 0:
            return True
        err = ctypes.get_errno()
        if err == errno.EEXIST:
            return None
        refused = refused and err in _NOT_OFFERED
    if refused:
        _TMPFILE_OK[0] = False
    # any other failure (a full disk, an I/O error) is left to the creation by name, which reports it
    return False


# what linkat(2) answers where linking an unnamed file is not offered (rather than failing this time)
_NOT_OFFERED = frozenset({errno.EPERM, errno.EACCES, errno.ENOENT, errno.EINVAL, errno.EXDEV, errno.EOPNOTSUPP,
                          errno.ENOSYS})


def _unnamed_held(folder: Path, content: bytes, mode: int) -> int | None:
    """An unnamed file in ``folder`` (``O_TMPFILE``), locked with ``flock(mode)`` and holding ``content``;
    None where the file system or platform does not offer one."""
    if not _TMPFILE_OK[0]:
        return None
    try:
        fd = os.open(folder, os.O_TMPFILE | os.O_RDWR, 0o644)
    except OSError as exc:
        if exc.errno in (errno.EOPNOTSUPP, errno.EISDIR, errno.EINVAL, errno.ENOSYS):
            _TMPFILE_OK[0] = False  # not offered by this file system or kernel (EISDIR: kernels before 3.11)
        return None  # anything else (a missing folder, a full disk) is met again, and reported, by name
    try:
        fcntl.flock(fd, mode)
        os.write(fd, content)
    except BaseException:
        os.close(fd)
        raise
    return fd
