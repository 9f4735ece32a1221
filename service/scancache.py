"""The scanned-column cache of a streamed training job: decode each partition once, read it back mapped.

A streamed training reads its source several times (``service.engine.streaming``: the scan, the
summaries of every basis group, the last pass; MAE adds one). ``ScanCache.wrap`` gives the engine
partitions that, on their first complete read (the scan), write every batch they yield, as converted by
the one reader (``service.sources.arrow_columns``: numbers as float64, labels as text, ...), to an Arrow
IPC file in the job's scratch folder (``service.store.scratch``), and on every later read map that file
into memory (one mapping per batch, so memory holds the batches in use, not the partition) and yield the
same batches, with the same row boundaries and bit-identical values, instead
of decoding Parquet or parsing CSV again. Numeric columns come back as read-only views of the mapped
file (no copy); the engine only reads its batches.

Bounds and fall-backs, none of which changes a result:

* the files together stay within ``limit`` bytes (the setting ``scan_cache_bytes``): the partition whose
  file would pass it is read from the source on every pass, as are all partitions after it;
* a partition whose read did not complete (an error, a cancel), a column the cache cannot hold exactly,
  or a write that fails (disk full) leaves no file, and the source is read again;
* a later read with other columns or another batch size reads the source.

What the first read yielded is what later passes see: the source's own checks ran while it was read (a
file changed after submission fails that read, and then nothing is kept). ``close`` removes the files;
the scratch folder itself is removed by whoever made it.
"""

from __future__ import annotations

import os
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator

import numpy as np


@dataclass
class _Entry:
    path: Path
    columns: tuple[str, ...]
    batch_rows: int
    nbytes: int


@dataclass
class ScanCache:
    """The cache of one training job: files in ``folder``, at most ``limit`` bytes in all. ``reads`` counts
    partition reads by where their rows came from: ``written`` (decoded and kept), ``mapped`` (the cache),
    ``source`` (decoded again: past the limit, or not cacheable)."""

    folder: Path
    limit: int
    used: int = 0
    full: bool = False  # a partition passed the limit: later partitions are not cached
    entries: dict[int, _Entry] = field(default_factory=dict)
    reads: dict[str, int] = field(default_factory=lambda: {"written": 0, "mapped": 0, "source": 0})
    _next_index: int = 0  # partitions below it may have left a temporary file
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def wrap(self, parts: list) -> list["CachedPart"]:
        return [CachedPart(p, self, i) for i, p in enumerate(parts)]

    def close(self) -> None:
        """Remove every file this cache wrote (finished or not)."""
        with self._lock:
            entries, self.entries = list(self.entries.values()), {}
            self.used = 0
        for e in entries:
            e.path.unlink(missing_ok=True)
        for i in range(self._next_index):
            _tmp(self._path(i)).unlink(missing_ok=True)

    def __enter__(self) -> "ScanCache":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def _path(self, index: int) -> Path:
        return Path(self.folder) / f"part-{index}.arrow"  # the names service.store.scratch removes

    def _lookup(self, index: int, columns: list[str], batch_rows: int) -> _Entry | None:
        with self._lock:
            e = self.entries.get(index)
        if e is None or e.batch_rows != batch_rows or not set(columns) <= set(e.columns):
            return None
        return e

    def _may_write(self, index: int) -> bool:
        with self._lock:
            if self.full or self.limit <= 0 or index in self.entries:
                return False
            self._next_index = max(self._next_index, index + 1)
            return True

    def _room(self) -> int:
        with self._lock:
            return self.limit - self.used

    def _keep(self, index: int, entry: _Entry) -> bool:
        with self._lock:
            if self.used + entry.nbytes > self.limit:
                self.full = True
                return False
            self.entries[index] = entry
            self.used += entry.nbytes
            return True

    def _count(self, what: str) -> None:
        with self._lock:
            self.reads[what] += 1


def _tmp(path: Path) -> Path:
    return path.with_name(path.name + ".part")


def _arrow_type(arr: np.ndarray):
    """The Arrow type that gives ``arr`` back exactly, or None (then the partition is not cached)."""
    import pyarrow as pa

    kind = arr.dtype.kind
    if kind == "f" and arr.dtype == np.float64:
        return pa.float64()
    if kind == "b":
        return pa.bool_()
    if kind in "iu":
        return pa.from_numpy_dtype(arr.dtype)
    if kind == "M":
        return pa.from_numpy_dtype(arr.dtype)
    if kind == "O":
        return pa.large_string()
    return None


def _to_numpy(col, dtype: np.dtype) -> np.ndarray:
    out = col.to_numpy(zero_copy_only=False)
    if dtype.kind == "O":
        return np.asarray(out, dtype=object)
    return out


@dataclass(eq=False)
class CachedPart:
    """A partition (``offset``, ``read``) whose first complete read is kept by its ``ScanCache``."""

    inner: Any
    cache: ScanCache
    index: int

    @property
    def offset(self) -> int:
        return self.inner.offset

    def __getattr__(self, name: str) -> Any:  # path, rows, ref, ... of the partition it wraps
        if name == "inner":
            raise AttributeError(name)
        return getattr(self.inner, name)

    def read(self, columns: list[str], batch_rows: int) -> Iterator[dict[str, np.ndarray]]:
        entry = self.cache._lookup(self.index, columns, batch_rows)
        if entry is not None:
            self.cache._count("mapped")
            yield from self._mapped(entry, columns)
            return
        if not self.cache._may_write(self.index):
            self.cache._count("source")
            yield from self.inner.read(columns, batch_rows)
            return
        self.cache._count("written")
        yield from self._write_through(columns, batch_rows)

    def _mapped(self, entry: _Entry, columns: list[str]) -> Iterator[dict[str, np.ndarray]]:
        import pyarrow as pa

        reader = pa.ipc.open_file(pa.memory_map(str(entry.path), "r"))
        index = {name: i for i, name in enumerate(reader.schema.names)}
        dtypes = {name: np.dtype(reader.schema.metadata[f"dtype:{name}".encode()].decode()) for name in columns}
        count = reader.num_record_batches
        del reader
        for i in range(count):
            # a mapping per batch, released with the batch's arrays: the pages of the partition's earlier
            # batches do not stay mapped (and counted in this process's memory) while it is read
            rb = pa.ipc.open_file(pa.memory_map(str(entry.path), "r")).get_batch(i)
            yield {name: _to_numpy(rb.column(index[name]), dtypes[name]) for name in columns}
            del rb

    def _write_through(self, columns: list[str], batch_rows: int) -> Iterator[dict[str, np.ndarray]]:
        import pyarrow as pa

        path = self.cache._path(self.index)
        tmp = _tmp(path)
        sink = writer = None
        types: dict[str, Any] | None = None
        keeping, done = True, False
        room = self.cache._room()

        def drop() -> None:
            nonlocal sink, writer, keeping
            keeping = False
            for closing in (writer, sink):
                try:
                    if closing is not None:
                        closing.close()
                except (OSError, pa.ArrowException):
                    pass
            writer = sink = None
            tmp.unlink(missing_ok=True)

        try:
            for batch in self.inner.read(columns, batch_rows):
                if keeping:
                    try:
                        if types is None:
                            types = {c: _arrow_type(np.asarray(batch[c])) for c in columns}
                            if any(t is None for t in types.values()):
                                raise TypeError("a column the cache cannot hold exactly")
                        rb = pa.record_batch([pa.array(batch[c], type=types[c]) for c in columns], names=columns)
                        if writer is None:
                            for j, c in enumerate(columns):  # exactly what was yielded, or not kept at all
                                back = _to_numpy(rb.column(j), batch[c].dtype)
                                if back.dtype != batch[c].dtype or not np.array_equal(back, batch[c]):
                                    raise TypeError(f"column {c!r} would not come back as it was")
                            meta = {f"dtype:{c}": np.asarray(batch[c]).dtype.str for c in columns}
                            sink = pa.OSFile(str(tmp), "wb")
                            writer = pa.ipc.new_file(sink, rb.schema.with_metadata(meta))
                        writer.write_batch(rb)
                        if sink.tell() > room:
                            with self.cache._lock:
                                self.cache.full = True
                            drop()
                    except OSError:  # a full or failing disk: no later partition tries either
                        with self.cache._lock:
                            self.cache.full = True
                        drop()
                    except (pa.ArrowException, TypeError, ValueError):
                        drop()
                yield batch
            done = True
        finally:
            if not done:
                drop()
        if keeping and writer is not None:
            try:
                writer.close()
                sink.close()
                nbytes = tmp.stat().st_size
                os.replace(tmp, path)
            except (OSError, pa.ArrowException):
                drop()
                return
            if not self.cache._keep(self.index, _Entry(path, tuple(columns), batch_rows, nbytes)):
                path.unlink(missing_ok=True)
