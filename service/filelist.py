"""The files of a training ``source``, fixed when the job is submitted and checked every time they are read.

A job that reads a folder (or a large file) out of core runs long after it was accepted, and reads its
files several times (one pass per map-reduce step, see ``service.engine.streaming``). Between those
moments the files can change: a symbolic link to data outside the data folder can be added to the
folder, a file can be rewritten or deleted. So the list is fixed once, at submission, as
``FileRef`` entries (name relative to the data folder, size, modification time in nanoseconds, a
SHA-256 digest, row count and Hive partition values), stored with the job; the worker reads exactly that
list and nothing else, and every open re-checks the entry:

* the file is opened with ``O_NOFOLLOW`` (a symbolic link put in its place is refused), and the path of
  the descriptor actually opened (``/proc/self/fd``, or ``realpath`` where there is no ``/proc``) must
  lie inside the data folder, so a folder swapped for a link on the way is refused too;
* size and modification time must be those recorded (``fstat`` on the open descriptor, at the start and
  at the end of every read);
* Parquet: the footer (schema, row groups, statistics, column chunk offsets) must hash to the recorded
  digest; CSV: the submission records a digest of the first and last ``SAMPLE_BYTES``, the training
  process the digest of the whole content before its first pass (``with_content_digest``), and every
  pass re-hashes the bytes it parses and compares at the end of the file.

Any difference raises ``SourceChanged`` naming the file relative to the data folder (never absolutely).
A change that keeps size, modification time (to the nanosecond) and the sampled bytes between the
submission and the first pass is not seen: that needs a deliberate reset of the modification time.

Folder listing: files whose name ends in ``.parquet`` or ``.pq`` in any letter case, in the folder and
its subfolders, in sorted path order; names starting with ``.`` or ``_`` (``_SUCCESS``, ``.crc`` and
other writers' side files) are skipped, as pyarrow datasets do. Subfolders named ``key=value`` (Hive
partitioning) give every row of the files under them a column ``key``: a number when every value of the
key is an integer (pyarrow's own inference), else text.

Standard library, plus pyarrow where a Parquet footer is read (layer 2).
"""

from __future__ import annotations

import errno
import hashlib
import io
import os
import re
import stat
from dataclasses import dataclass, replace
from pathlib import Path, PurePosixPath
from typing import Any, BinaryIO
from urllib.parse import unquote

from service.errors import InvalidData, SourceChanged

PARQUET_SUFFIXES = (".parquet", ".pq")
CSV_SUFFIXES = (".csv", ".txt")
SKIPPED_PREFIXES = (".", "_")
SAMPLE_BYTES = 1 << 16  # bytes at each end of a CSV file hashed at submission
HIVE_NULL = "__HIVE_DEFAULT_PARTITION__"
_HINT = ("leave the files of a source unchanged while its job is queued or running (write new data to a new "
         "file or folder), then submit the job again")
# magic bytes of compressed files (RFC 1952 gzip, zstd RFC 8878, bzip2, xz, zip): common practice
COMPRESSED = ((b"\x1f\x8b", "gzip"), (b"\x28\xb5\x2f\xfd", "zstd"), (b"BZh", "bzip2"),
              (b"\xfd7zXZ\x00", "xz"), (b"PK\x03\x04", "zip"))


def compression_of(head: bytes) -> str | None:
    """The compression format whose magic bytes start ``head``, or None."""
    return next((name for magic, name in COMPRESSED if head.startswith(magic)), None)


def compressed_refusal(where: str, fmt: str) -> InvalidData:
    return InvalidData(
        f"{where} is a {fmt}-compressed file; Tikhon reads uncompressed CSV and Parquet (Parquet compresses its "
        "columns itself): decompress it, or convert it to Parquet, and submit again.",
        errors=[{"field": where.split("=")[0] if where.startswith("data.") else "file", "message": f"{fmt}-compressed"}])


@dataclass(frozen=True)
class FileRef:
    """One file of a source as it was at submission (``name`` is relative to ``root``, POSIX form)."""

    root: str
    name: str
    size: int
    mtime_ns: int
    kind: str  # "parquet" | "csv"
    digest: str
    content: bool = False  # CSV: whether ``digest`` covers every byte (else the first and last SAMPLE_BYTES)
    rows: int | None = None  # Parquet: from the footer
    partition: tuple[tuple[str, str], ...] = ()  # Hive key=value folders above the file

    # -- stored with the job ------------------------------------------------------------------------
    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"name": self.name, "bytes": self.size, "mtime_ns": self.mtime_ns, "kind": self.kind,
                               "sha256": self.digest, "rows": self.rows}
        if self.partition:
            out["partition"] = dict(self.partition)
        return out

    @classmethod
    def from_json(cls, root: Any, d: dict[str, Any]) -> FileRef:
        return cls(root=os.path.realpath(os.fspath(root)), name=str(d["name"]), size=int(d["bytes"]),
                   mtime_ns=int(d["mtime_ns"]), kind=str(d["kind"]), digest=str(d["sha256"]),
                   rows=None if d.get("rows") is None else int(d["rows"]),
                   partition=tuple((str(k), str(v)) for k, v in (d.get("partition") or {}).items()))

    @property
    def path(self) -> str:
        return os.path.join(self.root, *PurePosixPath(self.name).parts)

    # -- opening, checked ---------------------------------------------------------------------------
    def open(self) -> BinaryIO:
        """The file, opened and checked against this entry (see the module docstring)."""
        flags = os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_CLOEXEC", 0)
        try:
            fd = os.open(self.path, flags)
        except (FileNotFoundError, NotADirectoryError):
            raise self._changed("was deleted or renamed") from None
        except OSError as exc:
            if exc.errno == errno.ELOOP:
                raise self._changed("was replaced by a symbolic link") from None
            raise InvalidData(f"the source file {self.name!r} cannot be read ({exc.strerror or type(exc).__name__}); "
                              "check its permissions in the data folder (TIKHON_DATA_DIR).") from None
        try:
            if not _inside(_opened_path(fd, self.path), self.root):
                raise self._changed("now resolves outside the data folder (a folder on its path was replaced by a "
                                    "symbolic link)")
            st = os.fstat(fd)
            if not stat.S_ISREG(st.st_mode):
                raise self._changed("is no longer a regular file")
            fh = os.fdopen(fd, "rb")
        except BaseException:
            os.close(fd)
            raise
        try:
            self.check_stat(os.fstat(fh.fileno()))
            if self.kind == "parquet":
                if parquet_footer(fh, self.size, self.name)[0] != self.digest:
                    raise self._changed("was rewritten (its Parquet footer differs)")
            elif not self.content and csv_sample_digest(fh, self.size) != self.digest:
                raise self._changed("was rewritten (its first or last bytes differ)")
            fh.seek(0)
        except BaseException:
            fh.close()
            raise
        return fh

    def check_stat(self, st: os.stat_result) -> None:
        if st.st_size != self.size:
            raise self._changed(f"changed size ({self.size:,} bytes at submission, {st.st_size:,} now)")
        if st.st_mtime_ns != self.mtime_ns:
            raise self._changed("was modified (its modification time differs from the one at submission)")

    def with_content_digest(self) -> FileRef:
        """This CSV entry with the digest of its whole content (read once, checked as it was at submission)."""
        if self.kind != "csv" or self.content:
            return self
        h = hashlib.sha256()
        with self.open() as fh:
            while chunk := fh.read(1 << 20):
                h.update(chunk)
            self.check_stat(os.fstat(fh.fileno()))
        return replace(self, digest=h.hexdigest(), content=True)

    def reader(self) -> CheckedReader:
        """A binary stream of the file that checks, at its end, that the bytes read are the ones recorded
        (CSV with a content digest) and that size and modification time did not change meanwhile."""
        return CheckedReader(self, self.open())

    def _changed(self, what: str) -> SourceChanged:
        return SourceChanged(
            f"the source file {self.name!r} {what} after the job was submitted; the job stopped so that no version "
            f"mixes two states of its data: {_HINT}.",
            errors=[{"field": "data.source", "value": self.name, "message": "changed after submission"}])


class CheckedReader(io.RawIOBase):
    """A read-only stream over an opened ``FileRef`` that hashes what it hands out and checks at the end."""

    def __init__(self, ref: FileRef, fh: BinaryIO):
        super().__init__()
        self._ref, self._fh = ref, fh
        self._hash = hashlib.sha256() if ref.kind == "csv" and ref.content else None
        self._done = False

    def readable(self) -> bool:
        return True

    def readinto(self, b) -> int:
        n = self._fh.readinto(b)
        if n:
            if self._hash is not None:
                self._hash.update(memoryview(b)[:n])
        else:
            self.finish()
        return n

    def finish(self) -> None:
        """Check the whole file was as recorded (reads what the parser left unread, if anything)."""
        if self._done:
            return
        while chunk := self._fh.read(1 << 20):
            if self._hash is not None:
                self._hash.update(chunk)
        self._done = True
        self._ref.check_stat(os.fstat(self._fh.fileno()))
        if self._hash is not None and self._hash.hexdigest() != self._ref.digest:
            raise self._ref._changed("was rewritten (its content differs from the first pass)")

    def close(self) -> None:
        if not self.closed:
            self._fh.close()
        super().close()


def native(fh: BinaryIO):
    """A pyarrow native file over the already opened and checked ``fh`` (the same inode, through
    ``/proc/self/fd``), which pyarrow reads several times faster than a Python file object; ``fh`` itself
    where there is no ``/proc``."""
    import pyarrow as pa

    try:
        return pa.OSFile(f"/proc/self/fd/{fh.fileno()}")
    except (OSError, ValueError):
        return fh


def _opened_path(fd: int, fallback: str) -> str:
    try:
        return os.readlink(f"/proc/self/fd/{fd}")
    except OSError:  # no /proc (not Linux): the path resolved now; O_NOFOLLOW still covered the last component
        return os.path.realpath(fallback)


def _inside(path: str, root: str) -> bool:
    return path == root or path.startswith(root.rstrip(os.sep) + os.sep)


def parquet_footer(fh: BinaryIO, size: int, name: str) -> tuple[str, int]:
    """(SHA-256 of the footer with its length and magic, footer length) of a Parquet file (Apache Parquet
    file format: ... <footer> <4-byte little-endian footer length> "PAR1")."""
    bad = InvalidData(f"{name!r} is not a readable Parquet file (no Parquet footer); write it with a Parquet "
                      "writer (pyarrow, pandas.to_parquet, Spark, ...) or remove it from the source.",
                      errors=[{"field": "data.source", "value": name, "message": "not Parquet"}])
    if size < 12:
        raise bad
    fh.seek(size - 8)
    tail = fh.read(8)
    if len(tail) != 8 or tail[4:] != b"PAR1":
        raise bad
    n = int.from_bytes(tail[:4], "little")
    if n <= 0 or n > size - 12:
        raise bad
    fh.seek(size - 8 - n)
    footer = fh.read(n)
    return hashlib.sha256(footer + tail).hexdigest(), n


def csv_sample_digest(fh: BinaryIO, size: int) -> str:
    h = hashlib.sha256(str(size).encode() + b"\x00")
    fh.seek(0)
    h.update(fh.read(SAMPLE_BYTES))
    if size > SAMPLE_BYTES:
        fh.seek(max(SAMPLE_BYTES, size - SAMPLE_BYTES))
        h.update(fh.read(SAMPLE_BYTES))
    return h.hexdigest()


# ---- listing at submission ------------------------------------------------------------------------------


def list_source(root: Any, target: Any, *, where: str = "data.source", max_files: int | None = None) -> list[FileRef]:
    """The fixed file list of ``target`` (a file or folder already resolved inside ``root``)."""
    root_s = os.path.realpath(os.fspath(root))
    target_p = Path(os.path.realpath(os.fspath(target)))
    if not _inside(str(target_p), root_s):
        raise InvalidData(f"{where} resolves outside the data folder; give a path relative to the data folder "
                          "(TIKHON_DATA_DIR).", errors=[{"field": where, "message": "escapes the data folder"}])
    if not target_p.is_dir():
        return [_ref(root_s, target_p, _kind_of(target_p, where), ())]
    found: list[tuple[str, Path]] = []
    for dirpath, dirnames, filenames in os.walk(target_p, followlinks=False, onerror=_walk_error(where)):
        here = Path(dirpath)
        for d in list(dirnames):
            full = here / d
            if d.startswith(SKIPPED_PREFIXES):
                dirnames.remove(d)
            elif full.is_symlink():
                dirnames.remove(d)
                if not _inside(os.path.realpath(full), root_s):
                    raise _outside(where, full, target_p)
        dirnames.sort()
        for f in filenames:
            if f.startswith(SKIPPED_PREFIXES) or not f.lower().endswith(PARQUET_SUFFIXES):
                continue
            full = here / f
            real = Path(os.path.realpath(full))
            if not _inside(str(real), root_s):
                raise _outside(where, full, target_p)
            if not real.is_file():
                continue
            found.append((full.relative_to(target_p).as_posix(), real))
    found.sort(key=lambda t: t[0])
    if not found:
        raise InvalidData(
            f"{where} is a folder with no Parquet files (names ending in .parquet or .pq, in any letter case, in it or "
            "its subfolders; names starting with '.' or '_' are skipped); put the training data there as Parquet.",
            errors=[{"field": where, "message": "no Parquet files"}])
    if max_files is not None and len(found) > max_files:
        raise InvalidData(
            f"{where} holds {len(found):,} Parquet files, more than max_source_files={max_files:,}; combine them into "
            "fewer, larger files (or raise TIKHON_MAX_SOURCE_FILES).",
            errors=[{"field": where, "value": len(found), "message": "too many files"}])
    parts = [_hive(rel) for rel, _ in found]
    keys = {tuple(k for k, _ in p) for p in parts}
    if len(keys) > 1:
        a, b = sorted(keys)[:2]
        raise InvalidData(
            f"{where} mixes subfolder layouts: some files lie under key=value folders {list(a) or 'none'}, others "
            f"under {list(b) or 'none'}; give every file the same partition folders.",
            errors=[{"field": where, "message": "mixed partition folders"}])
    return [_ref(root_s, real, "parquet", part) for (_, real), part in zip(found, parts)]


def _hive(rel: str) -> tuple[tuple[str, str], ...]:
    out = []
    for comp in PurePosixPath(rel).parts[:-1]:
        m = re.fullmatch(r"([^=]+)=(.*)", comp)
        if m:
            out.append((unquote(m.group(1)), unquote(m.group(2))))
    return tuple(out)


def _walk_error(where: str):
    def raise_it(exc: OSError) -> None:
        raise InvalidData(f"{where} has a subfolder that cannot be listed ({exc.strerror or type(exc).__name__}); "
                          "check the permissions in the data folder (TIKHON_DATA_DIR).") from None
    return raise_it


def _outside(where: str, full: Path, base: Path) -> InvalidData:
    rel = full.relative_to(base).as_posix()
    return InvalidData(f"{where} holds {rel!r}, which resolves (through a symbolic link) outside the data folder; "
                       "give a path relative to the data folder (TIKHON_DATA_DIR) whose files all lie inside it.",
                       errors=[{"field": where, "value": rel, "message": "escapes the data folder"}])


def _kind_of(path: Path, where: str) -> str:
    name = path.name.lower()
    if name.endswith(PARQUET_SUFFIXES):
        return "parquet"
    if name.endswith(CSV_SUFFIXES):
        return "csv"
    fmt = next((f for suffix, f in ((".gz", "gzip"), (".zst", "zstd"), (".bz2", "bzip2"), (".xz", "xz"),
                                    (".zip", "zip")) if name.endswith(suffix)), None)
    if fmt:
        raise compressed_refusal(where, fmt)
    raise InvalidData(f"{where} names {path.name!r}, which is neither .csv nor .parquet (nor a folder of .parquet "
                      "files); convert it to CSV or Parquet.",
                      errors=[{"field": where, "value": path.name, "message": "unknown file type"}])


def ref_of(root: Any, path: Any, kind: str) -> FileRef:
    """The entry of one file already resolved inside ``root`` (an in-memory job's source, whose kind the caller
    decided from its first bytes rather than its name)."""
    return _ref(os.path.realpath(os.fspath(root)), Path(os.path.realpath(os.fspath(path))), kind, ())


def _ref(root: str, real: Path, kind: str, partition) -> FileRef:
    name = real.relative_to(root).as_posix()
    with open(real, "rb") as fh:
        st = os.fstat(fh.fileno())
        if kind == "parquet":
            digest, _ = parquet_footer(fh, st.st_size, name)
            rows = _footer_rows(fh, name)
        else:
            head = fh.read(8)
            fmt = compression_of(head)
            if fmt:
                raise compressed_refusal(f"data.source={name!r}", fmt)
            digest, rows = csv_sample_digest(fh, st.st_size), None
    return FileRef(root=root, name=name, size=st.st_size, mtime_ns=st.st_mtime_ns, kind=kind, digest=digest,
                   rows=rows, partition=tuple(partition))


def _footer_rows(fh: BinaryIO, name: str) -> int:
    import pyarrow.parquet as pq

    fh.seek(0)
    try:
        return int(pq.ParquetFile(fh).metadata.num_rows)
    except Exception as exc:  # pyarrow's own error types for a damaged footer
        raise InvalidData(f"{name!r} is not a readable Parquet file: {str(exc).splitlines()[0]}",
                          errors=[{"field": "data.source", "value": name, "message": "not Parquet"}]) from None


def refs_from_job(root: Any, files: list[dict[str, Any]]) -> list[FileRef]:
    return [FileRef.from_json(root, f) for f in files]
