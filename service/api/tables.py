"""Turning request payloads into validated columns, and staging training data for the worker.

Every table inside the service is a ``dict[str, numpy.ndarray]`` in column order: numeric columns
are float64, text columns (categorical inputs) are fixed-width unicode (``<U``), never object arrays.
All checks raise ``InvalidData`` / ``BudgetExceeded`` whose message names the column, the first
offending rows and the fix. Training data is staged for the worker as Parquet (pyarrow): typed,
checksummable, and it executes nothing when read.
"""

from __future__ import annotations

import io
import math
import os
from pathlib import Path, PurePosixPath
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from service.errors import BudgetExceeded, InvalidData, StorageFailure

Table = dict[str, np.ndarray]

_NUMBER = (int, float)


def _rows_list(ids: list[int]) -> str:
    shown = ", ".join(str(i) for i in ids[:5])
    return shown + (f" (and {len(ids) - 5} more)" if len(ids) > 5 else "")


def check_row_limit(n: int, limit: int, setting: str, where: str) -> None:
    if n > limit:
        raise BudgetExceeded(
            f"{where} holds {n} rows, above the limit {setting}={limit}; split the request into batches of at most "
            f"{limit} rows, or raise TIKHON_{setting.upper()} on the server.",
            limit=setting, allowed=limit, received=n,
        )


def from_rows(rows: Any, *, where: str = "rows") -> Table:
    """JSON rows (a list of objects with the same keys) -> columns. Rows are numbered from 0."""
    if not isinstance(rows, list):
        raise InvalidData(
            f"{where} must be a list of objects such as [{{\"flow_lps\": 12.5, \"head_m\": 30}}], got {type(rows).__name__}.",
            errors=[{"field": where, "message": "expected a list of objects"}],
        )
    if not rows:
        raise InvalidData(f"{where} is empty; send at least one row.", errors=[{"field": where, "message": "empty"}])
    first = rows[0]
    if not isinstance(first, dict) or not first:
        raise InvalidData(
            f"{where}[0] must be a non-empty object mapping column names to values, got {first!r:.80}.",
            errors=[{"field": f"{where}[0]", "message": "expected an object"}],
        )
    names = list(first)
    n = len(rows)
    if n == 1:  # the single-row fast path: no per-column loops
        cols: Table = {}
        for name, v in first.items():
            t = type(v)
            if t is float or t is int:
                if t is float and not math.isfinite(v):
                    _bad_value(where, name, 0, v)
                cols[name] = np.array([v], dtype=np.float64)
            elif t is str:
                cols[name] = np.array([v])
            else:
                _bad_value(where, name, 0, v)
        return cols
    keyset = set(names)
    values: dict[str, list] = {k: [None] * n for k in names}
    for i, row in enumerate(rows):
        if not isinstance(row, dict):
            raise InvalidData(
                f"{where}[{i}] must be an object mapping column names to values, got {type(row).__name__}.",
                errors=[{"field": f"{where}[{i}]", "message": "expected an object"}],
            )
        if row.keys() != keyset:
            missing = sorted(keyset - row.keys())
            extra = sorted(row.keys() - keyset)
            parts = []
            if missing:
                parts.append(f"lacks {missing}")
            if extra:
                parts.append(f"has extra {extra}")
            raise InvalidData(
                f"{where}[{i}] {' and '.join(parts)} compared with {where}[0]; every row must have the same columns.",
                errors=[{"field": f"{where}[{i}]", "message": "columns differ from row 0", "value": sorted(row.keys())}],
            )
        for k, v in row.items():
            values[k][i] = v
    return {name: _column_from_values(name, vals, where) for name, vals in values.items()}


def _bad_value(where: str, name: str, i: int, v: Any):
    if isinstance(v, float):
        msg = f"{where}[{i}].{name} is {v}, which is not a finite number; send a finite number or drop the row."
    elif v is None:
        msg = f"{where}[{i}].{name} is null (a missing value); fill it in or drop the row."
    else:
        msg = f"{where}[{i}].{name} is {v!r:.60} ({type(v).__name__}); send a number, or a string for a categorical column."
    raise InvalidData(msg, errors=[{"field": f"{where}[{i}].{name}", "value": v, "message": "not a finite number or string"}])


def _column_from_values(name: str, vals: list, where: str) -> np.ndarray:
    kinds = {type(v) for v in vals}
    if kinds <= {int, float}:
        arr = np.asarray(vals, dtype=np.float64)
        bad = np.flatnonzero(~np.isfinite(arr))
        if bad.size:
            _bad_value(where, name, int(bad[0]), vals[int(bad[0])])
        return arr
    if kinds == {str}:
        return np.asarray(vals, dtype=str)
    for i, v in enumerate(vals):
        if type(v) not in (int, float, str) or (type(v) is float and not math.isfinite(v)):
            _bad_value(where, name, i, v)
    first_num = next(i for i, v in enumerate(vals) if type(v) in _NUMBER)
    first_str = next(i for i, v in enumerate(vals) if type(v) is str)
    raise InvalidData(
        f"{where} column {name!r} mixes numbers (e.g. row {first_num}) and strings (e.g. row {first_str}: "
        f"{vals[first_str]!r:.40}); a column holds either numbers or category labels.",
        errors=[{"field": f"{where}[{first_str}].{name}", "value": vals[first_str], "message": "mixed types in column"}],
    )


def from_arrow(table: pa.Table, *, where: str) -> Table:
    """An Arrow table (from CSV or Parquet) -> columns, refusing nulls, NaN/inf and unsupported types."""
    if table.num_rows == 0:
        raise InvalidData(f"{where} has a header but no rows; send at least one row.")
    names = table.column_names
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InvalidData(f"{where} repeats the column name(s) {dup}; every column needs a distinct name.")
    out: Table = {}
    for name in names:
        col = table.column(name)
        if col.null_count:
            nulls = np.flatnonzero(col.is_null().to_numpy(zero_copy_only=False)).tolist()
            raise InvalidData(
                f"{where} column {name!r} has missing values (empty, NA or NaN) at row(s) {_rows_list(nulls)} "
                "(rows counted from 0 after the header); fill them in or drop those rows.",
                errors=[{"field": name, "message": "missing values", "value": nulls[:20]}],
            )
        t = col.type
        if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
            arr = np.asarray(col.to_numpy(zero_copy_only=False), dtype=np.float64)
            bad = np.flatnonzero(~np.isfinite(arr)).tolist()
            if bad:
                raise InvalidData(
                    f"{where} column {name!r} holds non-finite values (inf or NaN) at row(s) {_rows_list(bad)}; "
                    "send finite numbers or drop those rows.",
                    errors=[{"field": name, "message": "non-finite values", "value": bad[:20]}],
                )
            out[name] = arr
        elif pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_dictionary(t):
            out[name] = np.asarray(col.cast(pa.string()).to_pylist(), dtype=str)
        elif pa.types.is_boolean(t):
            raise InvalidData(
                f"{where} column {name!r} holds true/false values; encode it as 0/1 numbers or as category labels."
            )
        else:
            raise InvalidData(
                f"{where} column {name!r} has the type {t}, which the service does not read; "
                "send numbers or text labels (dates as numbers, e.g. days since a fixed day)."
            )
    return out


def from_csv(payload: bytes | str, *, where: str = "csv") -> Table:
    data = payload.encode() if isinstance(payload, str) else payload
    if not data.strip():
        raise InvalidData(f"{where} is empty; send a header line and at least one row.")
    try:
        table = pacsv.read_csv(
            io.BytesIO(data),
            read_options=pacsv.ReadOptions(use_threads=False),
            convert_options=pacsv.ConvertOptions(strings_can_be_null=True),
        )
    except (pa.ArrowInvalid, pa.ArrowTypeError, UnicodeDecodeError) as exc:
        reason = " ".join(str(exc).split())
        _check_delimiter(data, where)
        raise InvalidData(
            f"{where} could not be parsed as CSV ({reason[:300]}); send comma-separated UTF-8 text with one header "
            "line and the same number of fields on every line."
        ) from None
    if table.num_columns == 1:
        _check_delimiter(data, where)
    return from_arrow(table, where=where)


_OTHER_DELIMITERS = {";": "semicolon (;)", "\t": "tab", "|": "vertical bar (|)"}


def _check_delimiter(data: bytes, where: str) -> None:
    """Refuse a CSV whose header is one field holding another delimiter (a semicolon- or tab-separated file),
    naming the delimiter found; otherwise return and let the caller's own message stand."""
    header = data.lstrip(b"\xef\xbb\xbf").split(b"\n", 1)[0].decode("utf-8", "replace").rstrip("\r")
    if "," in header:
        return
    for sep, label in _OTHER_DELIMITERS.items():
        parts = header.split(sep)
        if len(parts) > 1 and all(p.strip() for p in parts):
            shown = ", ".join(repr(p.strip()) for p in parts[:6]) + (", ..." if len(parts) > 6 else "")
            raise InvalidData(
                f"{where} is separated by {label}, not commas: its header {header[:120]!r} reads as one column. "
                f"Tikhon reads comma-separated CSV; save the file with commas as the separator (columns found: {shown}).",
                errors=[{"field": where, "value": sep, "message": f"delimiter {label} found; comma expected"}],
            )



def from_parquet(payload: bytes | Path, *, where: str) -> Table:
    try:
        source = pa.BufferReader(payload) if isinstance(payload, (bytes, bytearray)) else str(payload)
        table = pq.read_table(source)
    except (pa.ArrowException, OSError) as exc:
        reason = " ".join(str(exc).split())
        raise InvalidData(f"{where} could not be read as Parquet ({reason[:300]}); send a valid Parquet file or CSV.") from None
    return from_arrow(table, where=where)


def from_file_bytes(payload: bytes, filename: str | None, *, where: str) -> Table:
    """An uploaded file: Parquet when it starts with the Parquet magic bytes, else CSV."""
    if payload[:4] == b"PAR1":
        return from_parquet(payload, where=where)
    return from_csv(payload, where=where)


def resolve_source(data_dir: Path, source: Any, *, where: str = "data.source", allow_dir: bool = False) -> Path:
    """A path relative to ``data_dir`` that stays inside it after resolving symlinks.

    Refused: non-strings, empty strings, NUL bytes, absolute paths (POSIX or drive letters), any ``..``
    component, anything whose resolved target leaves ``data_dir``, and anything that is not a regular file
    (or, with ``allow_dir``, a folder whose every file also resolves inside ``data_dir``).
    """
    hint = f"give a path relative to the data folder (TIKHON_DATA_DIR={data_dir}), such as 'pumps/2024-06.csv'"
    if not isinstance(source, str) or not source.strip():
        raise InvalidData(f"{where} must be a non-empty string; {hint}.", errors=[{"field": where, "value": source, "message": "not a path"}])
    if "\x00" in source:
        raise InvalidData(f"{where} contains a NUL byte; {hint}.", errors=[{"field": where, "message": "NUL byte"}])
    posix = PurePosixPath(source.replace("\\", "/"))
    if posix.is_absolute() or (len(source) > 1 and source[1] == ":") or source.startswith("~"):
        raise InvalidData(f"{where}={source!r} is absolute; {hint}.", errors=[{"field": where, "value": source, "message": "absolute path"}])
    if ".." in posix.parts:
        raise InvalidData(f"{where}={source!r} contains '..'; {hint}.", errors=[{"field": where, "value": source, "message": "parent reference"}])
    root = Path(data_dir).resolve()
    target = (root / Path(*posix.parts)).resolve()
    if target != root and root not in target.parents:
        raise InvalidData(
            f"{where}={source!r} resolves (through a symbolic link) outside the data folder; {hint}.",
            errors=[{"field": where, "value": source, "message": "escapes the data folder"}],
        )
    if allow_dir and target.is_dir():
        for child in target.iterdir():
            real = child.resolve()
            if root not in real.parents:
                raise InvalidData(
                    f"{where}={source!r} holds {child.name!r}, which resolves outside the data folder; {hint}.",
                    errors=[{"field": where, "value": source, "message": "escapes the data folder"}],
                )
        return target
    if not target.is_file():
        raise InvalidData(
            f"{where}={source!r} is not a file in the data folder; {hint}.",
            errors=[{"field": where, "value": source, "message": "no such file"}],
        )
    return target


def read_source(path: Path, *, where: str = "data.source") -> Table:
    if path.suffix.lower() in (".parquet", ".pq"):
        return from_parquet(path, where=where)
    with open(path, "rb") as fh:
        head = fh.read(4)
    if head == b"PAR1":
        return from_parquet(path, where=where)
    return from_csv(path.read_bytes(), where=where)


def to_arrow(table: Table) -> pa.Table:
    return pa.table({k: pa.array(v) for k, v in table.items()})


def stage(table: Table, path: Path) -> Path:
    """Write ``table`` as Parquet at ``path`` atomically (temporary name, fsync, rename)."""
    tmp = path.with_name(path.name + ".part")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        pq.write_table(to_arrow(table), tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as exc:  # disk full, permissions: nothing half-written stays behind
        tmp.unlink(missing_ok=True)
        reason = getattr(exc, "strerror", None) or " ".join(str(exc).split())[:200]
        raise StorageFailure(
            f"the training data could not be staged under {path.parent} ({reason}); nothing was stored and no job "
            "was created. Free space in the store folder (TIKHON_STORE) and submit again."
        ) from None
    return path


def read_staged(path: Path) -> Table:
    return from_parquet(Path(path), where="staged training data")
