"""Training data sources read in row batches: a Parquet file, a folder of Parquet files, or a CSV file.

This is where files are read (the engine only sees partitions). A partition is a picklable
description — a file (a ``service.filelist.FileRef``: the file as fixed at submission) and which row
groups — so a Dask worker can read its own share of the data where it runs; every read opens the file
through its ``FileRef``, which re-checks it (inside the data folder, same size, mtime and digest).
``open_files`` (a fixed list) and ``open_source`` (a path, listed now) return the column schema and the
partitions in a fixed order, each with the position of its first row in the whole source (for
positional row keys).
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np

from service.errors import InvalidData
from service.filelist import HIVE_NULL, FileRef, list_source, native

PARTITION_ROWS = 1_000_000  # target rows per Parquet partition (whole row groups are never split)


def _columns(batch, columns: list[str]) -> dict[str, np.ndarray]:
    out = {}
    for name in columns:
        col = batch.column(batch.schema.get_field_index(name))
        out[name] = np.asarray(col.to_numpy(zero_copy_only=False))
    return out


@dataclass(frozen=True)
class ParquetPart:
    ref: FileRef  # the file as fixed at submission; every read re-checks it (service.filelist)
    row_groups: tuple[int, ...]
    offset: int
    rows: int
    extra: tuple[tuple[str, str, str], ...] = ()  # Hive partition columns: (name, kind, value)

    @property
    def path(self) -> str:
        return self.ref.path

    def read(self, columns: list[str], batch_rows: int) -> Iterator[dict[str, np.ndarray]]:
        import pyarrow.parquet as pq

        extra = {name: (kind, value) for name, kind, value in self.extra}
        stored = [c for c in columns if c not in extra]
        with self.ref.open() as fh, native(fh) as source, pq.ParquetFile(source) as f:
            for batch in f.iter_batches(batch_size=batch_rows, row_groups=list(self.row_groups), columns=stored):
                out = _columns(batch, stored)
                for name in columns:
                    if name in extra:
                        out[name] = _constant(*extra[name], batch.num_rows)
                yield {name: out[name] for name in columns}
            self.ref.check_stat(os.fstat(fh.fileno()))  # rewritten in place while this pass read it


def _constant(kind: str, value: str, rows: int) -> np.ndarray:
    if kind == "number":
        return np.full(rows, int(value), dtype=np.int64)
    out = np.empty(rows, dtype=object)
    out[:] = value
    return out


@dataclass(frozen=True)
class CsvPart:
    ref: FileRef
    offset: int = 0

    @property
    def path(self) -> str:
        return self.ref.path

    def read(self, columns: list[str], batch_rows: int) -> Iterator[dict[str, np.ndarray]]:
        import pyarrow as pa
        import pyarrow.csv as pcsv

        # about 64 bytes a row is a fair guess for numeric CSV; batches are cut by bytes, not rows
        opts = pcsv.ReadOptions(block_size=max(1 << 20, batch_rows * 64))
        with self.ref.reader() as raw:  # hashes the bytes it hands out; checked at the end of the file
            try:
                reader = pcsv.open_csv(pa.PythonFile(raw, mode="r"), read_options=opts,
                                       convert_options=pcsv.ConvertOptions(include_columns=columns))
                for batch in reader:
                    yield _columns(batch, columns)
            except Exception as exc:  # pyarrow raises ArrowInvalid with the line number
                if isinstance(exc, InvalidData):
                    raise
                raw.finish()  # a file rewritten under the parser is reported as such, not as a parse error
                raise InvalidData(f"the CSV file {self.ref.name!r} cannot be read: {str(exc).splitlines()[0]}; "
                                  "check that every row has the same number of fields") from None
            raw.finish()


def _kind(t) -> str:
    import pyarrow.types as pt

    if pt.is_boolean(t):
        return "boolean"  # the engine's one rule (service.engine.result.column_kind): not a number
    return "number" if (pt.is_integer(t) or pt.is_floating(t) or pt.is_decimal(t)) else "text"


def open_source(path: Path) -> tuple[dict[str, str], list]:
    """(schema: column → "number" | "boolean" | "text", partitions) of a Parquet file, Parquet folder or CSV
    file, listed now (``service.filelist.list_source``, with the path's own folder as the root)."""
    path = Path(path)
    root = path if path.is_dir() else path.parent
    return open_files(list_source(root, path, where=repr(path.name)))


def open_files(refs: list[FileRef]) -> tuple[dict[str, str], list]:
    """(schema, partitions) of exactly the files of a fixed list (Parquet files, or one CSV file); every
    file is opened through its ``FileRef``, which checks it is still the file that was listed."""
    if len(refs) == 1 and refs[0].kind == "csv":
        import pyarrow as pa
        import pyarrow.csv as pcsv

        ref = refs[0]
        with ref.open() as fh:
            try:
                reader = pcsv.open_csv(pa.PythonFile(fh, mode="r"))
            except Exception as exc:
                raise InvalidData(f"the CSV file {ref.name!r} cannot be read: {str(exc).splitlines()[0]}") from None
            schema = {f.name: _kind(f.type) for f in reader.schema}
            reader.close()
        _unique(list(schema), Path(ref.name))
        return schema, [CsvPart(ref)]
    if any(r.kind != "parquet" for r in refs):
        raise InvalidData("a source is one CSV file, one Parquet file or a folder of Parquet files")
    return _parquet(refs)


def _unique(names: list[str], path: Path) -> None:
    seen = set()
    for n in names:
        if n in seen:
            raise InvalidData(f"column name {n!r} appears more than once in {path.name!r}; give every column a unique name")
        seen.add(n)


def _parquet(refs: list[FileRef]) -> tuple[dict[str, str], list[ParquetPart]]:
    import pyarrow.parquet as pq

    schema: dict[str, str] | None = None
    types: dict[str, str] = {}
    first = ""
    parts: list[ParquetPart] = []
    offset = 0
    keys = [k for k, _ in refs[0].partition] if refs else []
    values = {k: [dict(r.partition)[k] for r in refs] for k in keys}
    kinds = {k: "number" if all(re.fullmatch(r"[+-]?\d+", v) for v in vs) else "text" for k, vs in values.items()}
    for k, vs in values.items():
        if HIVE_NULL in vs:
            raise InvalidData(f"the partition folder {k}={HIVE_NULL} marks rows with no value of {k!r}; Tikhon does not "
                              f"train on missing values: move those files out of the source or give them a value.")
    for ref in refs:
        with ref.open() as fh:
            try:
                f = pq.ParquetFile(fh)
            except Exception as exc:
                raise InvalidData(f"{ref.name!r} is not a readable Parquet file: {str(exc).splitlines()[0]}") from None
            with f:
                arrow = f.schema_arrow
                md = f.metadata
        names = [fld.name for fld in arrow]
        _unique(names, Path(ref.name))
        clash = [k for k in keys if k in names]
        if clash:
            raise InvalidData(f"{ref.name!r} has a column {clash[0]!r} and lies under a partition folder of the same "
                              "name; rename the column or the folder.")
        s = {fld.name: _kind(fld.type) for fld in arrow} | {k: kinds[k] for k in keys}
        t = {fld.name: str(fld.type) for fld in arrow} | {k: f"partition folder ({kinds[k]})" for k in keys}
        if schema is None:
            schema, types, first = s, t, ref.name
        elif s != schema:
            raise InvalidData(_schema_difference(first, types, schema, ref.name, t, s))
        extra = tuple((k, kinds[k], dict(ref.partition)[k]) for k in keys)
        group, rows = [], 0
        for g in range(md.num_row_groups):
            group.append(g)
            rows += md.row_group(g).num_rows
            if rows >= PARTITION_ROWS:
                parts.append(ParquetPart(ref, tuple(group), offset, rows, extra))
                offset += rows
                group, rows = [], 0
        if group:
            parts.append(ParquetPart(ref, tuple(group), offset, rows, extra))
            offset += rows
    return schema or {}, parts


def _schema_difference(first: str, t1: dict[str, str], s1: dict[str, str], other: str, t2: dict[str, str],
                       s2: dict[str, str]) -> str:
    """Say how two files' columns differ: missing, extra, or the same name with another kind of values."""
    said = []
    missing = [c for c in s1 if c not in s2]
    extra = [c for c in s2 if c not in s1]
    if missing:
        said.append(f"lacks column(s) {missing}")
    if extra:
        said.append(f"has extra column(s) {extra}")
    for c in s1:
        if c in s2 and s1[c] != s2[c]:
            said.append(f"stores {c!r} as {t2[c]} ({s2[c]}) where {first!r} stores {t1[c]} ({s1[c]})")
    return (f"{other!r} {'; '.join(said)}, compared with {first!r}; every file of a folder source must have the "
            "same columns with the same kind of values (numbers, text or booleans): rewrite the odd file, or move "
            "it out of the folder.")
