"""Scratch folders of training jobs: ``<store>/.scratch/<token>/``, proven ours before anything is removed.

A training job that streams its source keeps the columns its first pass decoded in a scratch folder
(``service.scancache``), so later passes read them instead of decoding the files again. A scratch
folder is made by ``job_scratch`` like a staging folder (``service.store.store``):

* ``<token>.lock`` (``token``: 32 hex digits) is created exclusively, holds ``SCRATCH_MARK`` and the job
  id, and is locked with a shared ``flock`` for as long as the job runs, by the worker that made it and by
  the training process that uses it (``share``): the folder is busy while either one lives;
* ``<token>/`` is created next, and in it ``.tikhon-scratch`` holds ``SCRATCH_MARK`` and the token;
* only files named like the cache names them (``CACHE_FILE``) are ever written in it.

When the block ends (the job succeeded, failed, was cancelled or its process was killed) the folder is
emptied of those files and removed with its lock. What a killed worker leaves behind is removed by
``sweep`` at the next start, and only when every proof holds: a lock file named by a token, holding the
mark, not locked by a living process (the sweep takes it exclusively, without waiting); a folder of the same token whose marker holds the mark and that
token. Even then only files named like the cache's are removed, and the folder only when that leaves it
empty (``rmdir``). Anything else (an unmarked folder, a foreign file, a symbolic link) is kept and
reported, never followed or removed.
"""

from __future__ import annotations

import fcntl
import os
import re
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from service.store import layout

SCRATCH_MARK = b"tikhon-scratch 1\n"
FOLDER_MARKER = ".tikhon-scratch"
CACHE_FILE = re.compile(r"part-\d{1,9}\.arrow(\.part)?")  # the names service.scancache writes, and no other


def scratch_root(store_root: Path) -> Path:
    return Path(store_root) / layout.SCRATCH_DIR


@contextmanager
def job_scratch(store_root: Path, job_id: str) -> Iterator[Path]:
    """A fresh scratch folder for job ``job_id`` under the store, held (``flock``) until the block ends, then
    emptied of the cache's files and removed. Raises ``OSError`` when it cannot be made (nothing is left)."""
    root = scratch_root(store_root)
    if root.is_symlink():
        raise OSError(f"{layout.SCRATCH_DIR} in the store is a symbolic link; scratch folders are not made there")
    root.mkdir(exist_ok=True)
    token, fd, lock_path = layout.new_held_lock(root, SCRATCH_MARK + job_id.encode("ascii", "replace")[:64] + b"\n",
                                                fcntl.LOCK_SH)
    folder = root / token
    try:
        try:
            folder.mkdir()
            (folder / FOLDER_MARKER).write_bytes(SCRATCH_MARK + token.encode() + b"\n")
        except OSError:
            _empty(folder, token)
            raise
        yield folder
    finally:
        try:
            if _empty(folder, token):
                lock_path.unlink(missing_ok=True)
        except OSError:  # kept; the next start's sweep removes it (or reports what it cannot prove ours)
            pass
        os.close(fd)


@contextmanager
def share(folder: Path) -> Iterator[Path]:
    """Hold ``folder`` (made by ``job_scratch`` in another process) busy while the block runs: a shared
    ``flock`` on its lock file, after checking the file holds the mark. Raises ``OSError`` otherwise."""
    folder = Path(folder)
    fd = os.open(folder.parent / f"{folder.name}.lock", os.O_RDONLY | os.O_NOFOLLOW)
    try:
        fcntl.flock(fd, fcntl.LOCK_SH)
        if os.pread(fd, len(SCRATCH_MARK), 0) != SCRATCH_MARK or not folder.is_dir() or folder.is_symlink():
            raise OSError(f"{folder.name} is not a scratch folder made for this job")
        yield folder
    finally:
        os.close(fd)


def _empty(folder: Path, token: str) -> bool:
    """Remove the cache's files, the marker and the folder ``folder`` of ``token``; True when it is gone.
    Anything not named by us stays (and so does the folder)."""
    try:
        st = os.lstat(folder)
    except FileNotFoundError:
        return True
    import stat

    if not stat.S_ISDIR(st.st_mode):
        return False  # a symbolic link or a file where our folder should be: not ours to remove
    try:
        marker = (folder / FOLDER_MARKER).read_bytes() if not (folder / FOLDER_MARKER).is_symlink() else b""
    except OSError:
        marker = b""
    if marker == SCRATCH_MARK + token.encode() + b"\n":
        for entry in os.scandir(folder):
            if CACHE_FILE.fullmatch(entry.name) and entry.is_file(follow_symlinks=False):
                os.unlink(entry.path)
        (folder / FOLDER_MARKER).unlink(missing_ok=True)
    try:
        folder.rmdir()  # only an empty folder: what we did not name is kept
    except OSError:
        return False
    return True


def sweep(store_root: Path, kept: list[str]) -> int:
    """Remove the scratch folders of jobs whose process is gone (their lock is free), under the proofs of
    the module docstring; append what is kept (``.scratch/<name>``) to ``kept``. Returns folders removed."""
    root = scratch_root(store_root)
    try:
        st = os.lstat(root)
    except FileNotFoundError:
        return 0
    import stat

    if not stat.S_ISDIR(st.st_mode):
        kept.append(layout.SCRATCH_DIR)
        return 0
    removed = 0
    names = sorted(os.listdir(root))
    for name in names:
        token = name[: -len(".lock")] if name.endswith(".lock") else name
        if not layout.HEX_TOKEN.fullmatch(token):
            kept.append(f"{layout.SCRATCH_DIR}/{name}")
            continue
        if not name.endswith(".lock"):
            if f"{token}.lock" not in names:  # a folder with no lock of ours: not provably ours
                kept.append(f"{layout.SCRATCH_DIR}/{name}")
            continue
        try:
            fd = os.open(root / name, os.O_RDWR | os.O_NOFOLLOW)
        except OSError:  # a symbolic link, or gone meanwhile
            if (root / name).is_symlink():
                kept.append(f"{layout.SCRATCH_DIR}/{name}")
            continue
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                continue  # a running job holds it
            if os.pread(fd, len(SCRATCH_MARK), 0) != SCRATCH_MARK:
                kept.append(f"{layout.SCRATCH_DIR}/{name}")
                continue
            try:
                gone = _empty(root / token, token)
                if gone:
                    (root / name).unlink(missing_ok=True)
            except OSError:
                gone = False
            if gone:
                removed += 1
            else:
                kept.append(f"{layout.SCRATCH_DIR}/{token}")
        finally:
            os.close(fd)
    return removed
