"""Training data sources read in row batches: a Parquet file, a folder of Parquet files, or a CSV file.

This is where files are opened (the engine only sees partitions). A partition is a picklable
description — a path and which row groups — so a Dask worker can read its own share of the data
where it runs. ``open_source`` returns the column schema and the partitions in a fixed order, each with
the position of its first row in the whole source (for positional row keys).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np

from service.errors import InvalidData

PARTITION_ROWS = 1_000_000  # target rows per Parquet partition (whole row groups are never split)


def _columns(batch, columns: list[str]) -> dict[str, np.ndarray]:
    out = {}
    for name in columns:
        col = batch.column(batch.schema.get_field_index(name))
        out[name] = np.asarray(col.to_numpy(zero_copy_only=False))
    return out


@dataclass(frozen=True)
class ParquetPart:
    path: str
    row_groups: tuple[int, ...]
    offset: int
    rows: int

    def read(self, columns: list[str], batch_rows: int) -> Iterator[dict[str, np.ndarray]]:
        import pyarrow.parquet as pq

        with pq.ParquetFile(self.path) as f:
            for batch in f.iter_batches(batch_size=batch_rows, row_groups=list(self.row_groups), columns=columns):
                yield _columns(batch, columns)


@dataclass(frozen=True)
class CsvPart:
    path: str
    offset: int = 0

    def read(self, columns: list[str], batch_rows: int) -> Iterator[dict[str, np.ndarray]]:
        import pyarrow.csv as pcsv

        # about 64 bytes a row is a fair guess for numeric CSV; batches are cut by bytes, not rows
        opts = pcsv.ReadOptions(block_size=max(1 << 20, batch_rows * 64))
        try:
            reader = pcsv.open_csv(self.path, read_options=opts,
                                   convert_options=pcsv.ConvertOptions(include_columns=columns))
            for batch in reader:
                yield _columns(batch, columns)
        except Exception as exc:  # pyarrow raises ArrowInvalid with the line number
            if isinstance(exc, InvalidData):
                raise
            raise InvalidData(f"the CSV file {Path(self.path).name!r} cannot be read: {str(exc).splitlines()[0]}; "
                              "check that every row has the same number of fields") from None


def _kind(t) -> str:
    import pyarrow.types as pt

    if pt.is_boolean(t):
        return "boolean"  # the engine's one rule (service.engine.result.column_kind): not a number
    return "number" if (pt.is_integer(t) or pt.is_floating(t) or pt.is_decimal(t)) else "text"


def open_source(path: Path) -> tuple[dict[str, str], list]:
    """(schema: column → "number" | "boolean" | "text", partitions) of a Parquet file, Parquet folder or CSV file."""
    path = Path(path)
    if path.is_dir():
        files = sorted(p for p in path.iterdir() if p.suffix == ".parquet" and p.is_file())
        if not files:
            raise InvalidData(f"the folder {path.name!r} holds no .parquet files")
        return _parquet(files)
    suffix = path.suffix.lower()
    if suffix in (".parquet", ".pq"):
        return _parquet([path])
    if suffix in (".csv", ".txt"):
        import pyarrow.csv as pcsv

        try:
            reader = pcsv.open_csv(str(path))
        except Exception as exc:
            raise InvalidData(f"the CSV file {path.name!r} cannot be read: {str(exc).splitlines()[0]}") from None
        schema = {f.name: _kind(f.type) for f in reader.schema}
        reader.close()
        _unique(list(schema), path)
        return schema, [CsvPart(str(path))]
    raise InvalidData(f"the source {path.name!r} is neither .csv nor .parquet (nor a folder of .parquet files)")


def _unique(names: list[str], path: Path) -> None:
    seen = set()
    for n in names:
        if n in seen:
            raise InvalidData(f"column name {n!r} appears more than once in {path.name!r}; give every column a unique name")
        seen.add(n)


def _parquet(files: list[Path]) -> tuple[dict[str, str], list[ParquetPart]]:
    import pyarrow.parquet as pq

    schema: dict[str, str] | None = None
    parts: list[ParquetPart] = []
    offset = 0
    for p in files:
        try:
            f = pq.ParquetFile(str(p))
        except Exception as exc:
            raise InvalidData(f"{p.name!r} is not a readable Parquet file: {str(exc).splitlines()[0]}") from None
        with f:
            arrow = f.schema_arrow
            names = [fld.name for fld in arrow]
            _unique(names, p)
            s = {fld.name: _kind(fld.type) for fld in arrow}
            if schema is None:
                schema = s
            elif s != schema:
                raise InvalidData(f"{p.name!r} has columns {sorted(s)} but the first file has {sorted(schema)}; "
                                  "every file of a folder source must share one schema")
            md = f.metadata
            group, rows = [], 0
            for g in range(md.num_row_groups):
                group.append(g)
                rows += md.row_group(g).num_rows
                if rows >= PARTITION_ROWS:
                    parts.append(ParquetPart(str(p), tuple(group), offset, rows))
                    offset += rows
                    group, rows = [], 0
            if group:
                parts.append(ParquetPart(str(p), tuple(group), offset, rows))
                offset += rows
    return schema or {}, parts
