"""Turning request payloads into validated columns, and staging training data for the worker.

Every table inside the service is a ``dict[str, numpy.ndarray]`` in column order: numeric columns
are float64, text columns (categorical inputs) are object arrays of Python ``str``. Never fixed-width
unicode (``<U``): one long label would make every row as wide as it (100,000 rows and one
20,000-character label are 8 GB as ``<U20000``). Every label is at most ``max_label`` characters
(the setting ``max_label_chars``); a longer one is refused naming its row and column.
All checks raise ``InvalidData`` / ``BudgetExceeded`` whose message names the column, the first
offending rows and the fix. Training data is staged for the worker as Parquet (pyarrow): typed,
checksummable, and it executes nothing when read.
"""

from __future__ import annotations

import errno
import json
from dataclasses import dataclass
import math
import os
from pathlib import Path, PurePosixPath
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from service import paths, sources
from service.errors import BudgetExceeded, InvalidData, StorageFailure

Table = dict[str, np.ndarray]
UNUSED_TEXT_KEY = b"tikhon.unused_text"  # staged Parquet metadata: the source's text columns the spec left out


class Columns(dict):
    """A table read for a spec: only the columns it uses, and in ``unused_text`` the names of the text columns
    it left out (never read: the engine only says they were not used, ``engine.advice.data_warnings``)."""

    unused_text: tuple[str, ...] = ()


def _with_unused(cols: Table, types: dict[str, Any], columns: list[str], spec: Any) -> Table:
    if spec is None or not hasattr(spec, "cv"):
        return cols
    out = Columns(cols)
    out.unused_text = tuple(n for n, t in types.items() if n not in columns and sources.arrow_kind(t) == sources.TEXT)
    return out

_NUMBER = (int, float)

MAX_LABEL_CHARS = 256  # default of the setting max_label_chars


def _label_too_long(where: str, name: str, row: int, length: int, cap: int):
    raise BudgetExceeded(
        f"{where} column {name!r} holds a label of {length:,} characters at row {row} (rows counted from 0), above "
        f"the limit max_label_chars={cap}; category labels are short names: shorten it, or raise "
        "TIKHON_MAX_LABEL_CHARS on the server.",
        errors=[{"field": f"{where}[{row}].{name}", "value": length, "message": "label too long"}],
        limit="max_label_chars", allowed=cap, received=length,
    )


def text_column(name: str, vals: list, where: str, max_label: int | None) -> np.ndarray:
    """Python strings -> an object array, refusing a label longer than ``max_label`` characters."""
    arr = np.empty(len(vals), dtype=object)
    arr[:] = vals
    if max_label is not None and arr.size:
        lengths = np.fromiter(map(len, vals), dtype=np.int64, count=len(vals))
        over = np.flatnonzero(lengths > max_label)
        if over.size:
            _label_too_long(where, name, int(over[0]), int(lengths[over[0]]), max_label)
    return arr


def _rows_list(ids: list[int]) -> str:
    shown = ", ".join(str(i) for i in ids[:5])
    return shown + (f" (and {len(ids) - 5} more)" if len(ids) > 5 else "")


def check_row_limit(n: int, limit: int, setting: str, where: str, at_least: bool = False) -> None:
    if n > limit:
        raise BudgetExceeded(
            f"{where} holds {'at least ' if at_least else ''}{n} rows, above the limit {setting}={limit}; split the request into batches of at most "
            f"{limit} rows, or raise TIKHON_{setting.upper()} on the server.",
            limit=setting, allowed=limit, received=n,
        )


def from_rows(rows: Any, *, where: str = "rows", max_label: int | None = MAX_LABEL_CHARS) -> Table:
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
            elif t is bool:  # kept as booleans: the engine's one rule decides (not a number; labels if categorical)
                cols[name] = np.array([v], dtype=bool)
            elif t is str:
                if max_label is not None and len(v) > max_label:
                    _label_too_long(where, name, 0, len(v), max_label)
                col = np.empty(1, dtype=object)
                col[0] = v
                cols[name] = col
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
    return {name: _column_from_values(name, vals, where, max_label) for name, vals in values.items()}


def _bad_value(where: str, name: str, i: int, v: Any):
    if isinstance(v, float):
        msg = f"{where}[{i}].{name} is {v}, which is not a finite number; send a finite number or drop the row."
    elif v is None:
        msg = f"{where}[{i}].{name} is null (a missing value); fill it in or drop the row."
    else:
        msg = f"{where}[{i}].{name} is {v!r:.60} ({type(v).__name__}); send a number, or a string for a categorical column."
    raise InvalidData(msg, errors=[{"field": f"{where}[{i}].{name}", "value": v, "message": "not a finite number or string"}])


def _column_from_values(name: str, vals: list, where: str, max_label: int | None = MAX_LABEL_CHARS) -> np.ndarray:
    kinds = {type(v) for v in vals}
    if kinds <= {int, float}:
        arr = np.asarray(vals, dtype=np.float64)
        bad = np.flatnonzero(~np.isfinite(arr))
        if bad.size:
            _bad_value(where, name, int(bad[0]), vals[int(bad[0])])
        return arr
    if kinds == {str}:
        return text_column(name, vals, where, max_label)
    if kinds == {bool}:  # the engine's one rule decides (not a number; labels "true"/"false" if categorical)
        return np.asarray(vals, dtype=bool)
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


def from_arrow(table: pa.Table, *, where: str, max_label: int | None = MAX_LABEL_CHARS, spec: Any = None) -> Table:
    """An Arrow table (from CSV or Parquet) -> columns by the one rule (``service.sources.arrow_columns``):
    nulls, NaN/inf and types read nowhere are refused. With a training ``spec``, only the columns it uses
    are read (unused columns of any type are ignored, as when the source is streamed)."""
    if table.num_rows == 0:
        raise InvalidData(f"{where} has a header but no rows; send at least one row.")
    names = table.column_names
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InvalidData(f"{where} repeats the column name(s) {dup}; every column needs a distinct name.")
    columns = _used(spec, {f.name: f.type for f in table.schema}, where)
    return sources.arrow_columns(table, columns, where=where, text=sources.text_roles(spec), max_label=max_label)


def _used(spec: Any, types: dict[str, Any], where: str, sample=None) -> list[str]:
    if spec is None or not hasattr(spec, "cv"):
        return list(types)
    schema = {n: sources.arrow_kind(t) for n, t in types.items()}
    used = set(sources.check_used(schema, types, spec, where, sample)[1])
    return [n for n in types if n in used]  # in the file's order


def from_csv(payload: bytes | str | Path, *, where: str = "csv", max_label: int | None = MAX_LABEL_CHARS,
             spec: Any = None, max_rows: int | None = None, setting: str = "max_training_rows") -> Table:
    """CSV text, bytes, or a file (read by pyarrow from disk in blocks, never held in memory whole), typed by
    the one CSV rule (``service.sources.csv_types``: the spec's label columns as text, numeric columns as
    float64, malformed cells refused by column, row and value). Reading stops as soon as the rows pass
    ``max_rows``."""
    if isinstance(payload, Path):
        with open(payload, "rb") as fh:
            data = fh.read(1 << 16)  # the head: enough to tell an empty file and to read the header line
        opener = lambda: pa.OSFile(str(payload), "rb")  # noqa: E731 (no compression guessed from the name)
    elif callable(payload):  # opens the file (a source's checked FileRef.open)
        raw = payload
        with raw() as fh:
            data = fh.read(1 << 16)
        opener = lambda: pa.PythonFile(raw(), mode="r")  # noqa: E731
    else:
        data = payload.encode() if isinstance(payload, str) else payload
        opener = lambda: pa.BufferReader(data)  # noqa: E731
    if not data.strip():
        raise InvalidData(f"{where} is empty; send a header line and at least one row.")
    if data[:2] != b"\x1f\x8b":
        _check_delimiter(data, where)
    schema, types = sources.csv_head(opener, spec, where)
    columns = _used(spec, types, where)
    if spec is None:
        bad = [c for c in columns if schema[c] in (sources.OTHER, sources.TIME)]
        if bad:
            raise sources.unsupported(where, bad[0], types[bad[0]])
    parts: dict[str, list[np.ndarray]] = {c: [] for c in columns}
    rows = 0
    for pos, cols in sources.csv_batches(opener, types, columns, where=where, text=sources.text_roles(spec),
                                         max_label=max_label):
        rows = pos + len(next(iter(cols.values()))) if cols else pos
        if max_rows is not None:
            check_row_limit(rows, max_rows, setting, where, at_least=True)
        for c, v in cols.items():
            parts[c].append(v)
    return _with_unused({c: (np.concatenate(v) if len(v) != 1 else v[0]) for c, v in parts.items()}, types, columns,
                        spec)


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



def from_parquet(payload: bytes | Path, *, where: str, max_label: int | None = MAX_LABEL_CHARS, spec: Any = None,
                 max_rows: int | None = None, setting: str = "max_training_rows") -> Table:
    """A Parquet file: its footer is read first, so a file holding more than ``max_rows`` rows is refused
    before any row is decompressed; with a ``spec``, only the columns it uses are read."""
    opened = payload() if callable(payload) else None
    try:
        source = opened if opened is not None else (
            pa.BufferReader(payload) if isinstance(payload, (bytes, bytearray)) else str(payload))
        with pq.ParquetFile(source) as f:
            if max_rows is not None:
                check_row_limit(f.metadata.num_rows, max_rows, setting, where)
            types = {fld.name: fld.type for fld in f.schema_arrow}
            names = list(types)
            dup = sorted({n for n in names if names.count(n) > 1})
            if dup:
                raise InvalidData(f"{where} repeats the column name(s) {dup}; every column needs a distinct name.")
            if f.metadata.num_rows == 0:
                raise InvalidData(f"{where} has a header but no rows; send at least one row.")
            columns = _used(spec, types, where, sources.parquet_sample(f))
            table = f.read(columns=columns)
    except (pa.ArrowException, OSError) as exc:
        reason = " ".join(str(exc).split())
        raise InvalidData(f"{where} could not be read as Parquet ({reason[:300]}); send a valid Parquet file or CSV.") from None
    finally:
        if opened is not None:
            opened.close()
    return _with_unused(from_arrow(table, where=where, max_label=max_label, spec=spec), types, columns, spec)


def from_file_bytes(payload: bytes | Path, filename: str | None, *, where: str, max_label: int | None = MAX_LABEL_CHARS,
                    spec: Any = None, max_rows: int | None = None) -> Table:
    """An uploaded file (its bytes, or the file it was saved to): Parquet when it starts with the Parquet
    magic bytes, else CSV."""
    if isinstance(payload, Path) or callable(payload):
        with (open(payload, "rb") if isinstance(payload, Path) else payload()) as fh:
            head = fh.read(8)
    else:
        head = payload[:8]
    _refuse_compressed(head, where)
    read = from_parquet if head[:4] == b"PAR1" else from_csv
    return read(payload, where=where, max_label=max_label, spec=spec, max_rows=max_rows)


def _refuse_compressed(head: bytes, where: str) -> None:
    """A compressed file is refused by name of its format, never parsed as text (its bytes would be echoed)."""
    from service.filelist import compressed_refusal, compression_of

    fmt = compression_of(head)
    if fmt:
        raise compressed_refusal(where, fmt)


def resolve_source(data_dir: Path, source: Any, *, where: str = "data.source", allow_dir: bool = False) -> Path:
    """A path relative to ``data_dir`` that stays inside it after resolving symlinks.

    Refused: non-strings, empty strings, NUL bytes, absolute paths (POSIX or drive letters), any ``..``
    component, anything whose resolved target leaves ``data_dir``, and anything that is not a regular file
    (or, with ``allow_dir``, a folder whose every file also resolves inside ``data_dir``). A path the file
    system cannot look up (a name too long, a symbolic link loop, a folder without permission) is refused
    too. Messages name the path relative to the data folder, never its absolute location.
    """
    hint = "give a path relative to the data folder (TIKHON_DATA_DIR), such as 'pumps/2024-06.csv'"
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
    try:
        return _resolve_inside(root, posix, source, where=where, hint=hint, allow_dir=allow_dir)
    except (OSError, RuntimeError) as exc:  # RuntimeError: Path.resolve's "Symlink loop" before Python 3.13
        raise _unreachable(root, source, exc, where=where, hint=hint) from None


def _resolve_inside(root: Path, posix: PurePosixPath, source: str, *, where: str, hint: str, allow_dir: bool) -> Path:
    target = (root / Path(*posix.parts)).resolve()
    if target != root and root not in target.parents:
        raise InvalidData(
            f"{where}={source!r} resolves (through a symbolic link) outside the data folder; {hint}.",
            errors=[{"field": where, "value": source, "message": "escapes the data folder"}],
        )
    try:  # raises for a name too long, a loop, no permission (is_file() would hide some of them)
        os.stat(target)
    except (FileNotFoundError, NotADirectoryError):
        pass  # "not a file in the data folder", below
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


def _unreachable(root: Path, source: str, exc: BaseException, *, where: str, hint: str) -> InvalidData:
    """The refusal of a source path the file system could not look up, naming it relative to the data folder."""
    code = getattr(exc, "errno", None)
    if code == errno.ENAMETOOLONG:
        why, short = ("a file or folder name in it is longer than the file system allows (255 bytes per name on "
                      "most Linux file systems); shorten the name"), "name too long"
    elif code == errno.ELOOP or isinstance(exc, RuntimeError):
        why, short = ("it runs into a symbolic link loop inside the data folder; point the links at real files"), \
            "symbolic link loop"
    else:
        why, short = f"it cannot be looked up ({getattr(exc, 'strerror', None) or type(exc).__name__})", "cannot be read"
    shown = source if len(source) <= 120 else source[:60] + "..." + source[-40:]
    filename = getattr(exc, "filename", None)
    if filename and code is not None:
        inner = paths.shown(filename, root)
        if inner not in (".", shown):
            why += f" (at {inner[:120]!r})"
    return InvalidData(f"{where}={shown!r} cannot be used: {why}; {hint}.",
                       errors=[{"field": where, "value": shown, "message": short}])


def read_source(path: Path, *, where: str = "data.source", max_label: int | None = MAX_LABEL_CHARS, spec: Any = None,
                max_rows: int | None = None) -> Table:
    if path.suffix.lower() in (".parquet", ".pq"):
        return from_parquet(path, where=where, max_label=max_label, spec=spec, max_rows=max_rows)
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
    except OSError as exc:  # unreadable (permissions, an I/O error): the caller's 422, not a 500
        raise InvalidData(f"{where} cannot be read ({exc.strerror or type(exc).__name__}); check the file's "
                          "permissions in the data folder (TIKHON_DATA_DIR).") from None
    _refuse_compressed(head, where)
    if head[:4] == b"PAR1":
        return from_parquet(path, where=where, max_label=max_label, spec=spec, max_rows=max_rows)
    return from_csv(Path(path), where=where, max_label=max_label, spec=spec, max_rows=max_rows)


# ---- a training file at submission: a bounded look (the API process) -------------------------------------
# A file larger than a few blocks is not parsed whole where it is submitted: the API process reads its
# metadata and a bounded head (``inspect_file``), and the worker's training process reads the whole table
# (``read_for_job``) with the same reader and checks it with the same ``validate``, so a refusal found only
# there is the job's stored problem with the same body the submission would have answered.

FIRST_ROWS = 16_384  # rows of a Parquet file's first block checked at submission (a CSV: its first 1 MiB block)


@dataclass
class Inspection:
    """What the bounded look at a training file found."""

    rows: int  # exact: the Parquet footer, or the CSV counted up to the row limit
    kinds: dict[str, str]  # every column -> "number" | "boolean" | "text" | "time" | "other"
    columns: list[str]  # the columns the spec uses, in the file's order
    head: Table  # the first block of those columns, converted by the one reader
    whole: bool  # the head holds every row
    parquet: bool
    key_values: tuple | None = None  # Parquet: (min, max) of cv.row_key when every row group's statistics say so


def inspect_file(raw, *, where: str, spec: Any, max_rows: int, max_label: int | None,
                 setting: str = "max_training_rows") -> Inspection:
    """Check a training file (``raw()`` opens it, binary) against the spec from its metadata and a bounded
    head, in the words of the in-memory reader: compressed files, the header, the column types the spec
    uses, the first block's cells (malformed numbers, missing cells, long labels) and the row count against
    ``max_rows`` (Parquet: the footer; CSV: rows counted in 1 MiB blocks of one column, stopping past the
    limit). Memory stays within a few blocks whatever the file's size."""
    with raw() as fh:
        head = fh.read(8)
    _refuse_compressed(head, where)
    if head[:4] == b"PAR1":
        return _inspect_parquet(raw, where=where, spec=spec, max_rows=max_rows, max_label=max_label, setting=setting)
    return _inspect_csv(raw, where=where, spec=spec, max_rows=max_rows, max_label=max_label, setting=setting)


def _inspect_csv(raw, *, where, spec, max_rows, max_label, setting) -> Inspection:
    with raw() as fh:
        data = fh.read(1 << 16)
    if not data.strip():
        raise InvalidData(f"{where} is empty; send a header line and at least one row.")
    _check_delimiter(data, where)
    opener = lambda: pa.PythonFile(raw(), mode="r")  # noqa: E731
    schema, types = sources.csv_head(opener, spec, where)
    columns = _used(spec, types, where)
    batches = sources.csv_batches(opener, types, columns, where=where, text=sources.text_roles(spec),
                                  max_label=max_label)
    try:
        _, first = next(batches)
    finally:
        batches.close()
    rows = count_csv_rows(opener, next(iter(types)), where, max_rows)
    check_row_limit(rows, max_rows, setting, where, at_least=True)
    n_first = len(next(iter(first.values()))) if first else 0
    return Inspection(rows, schema, columns, first, n_first == rows, False)


def count_csv_rows(opener, column: str, where: str, limit: int | None = None) -> int:
    """Rows of a CSV file (after its header), read in the reader's 1 MiB blocks with one column kept as raw
    bytes (nothing converted), stopping at the first block that passes ``limit``: the count where the
    in-memory reader would have stopped. A line with another number of fields is refused as the reader
    refuses it."""
    import pyarrow.csv as pcsv

    src = opener()
    rows = 0
    try:
        reader = pcsv.open_csv(src, read_options=pcsv.ReadOptions(block_size=sources.CSV_TYPE_BLOCK, use_threads=False),
                               convert_options=pcsv.ConvertOptions(include_columns=[column],
                                                                   column_types={column: pa.binary()}))
        for batch in reader:
            rows += batch.num_rows
            if limit is not None and rows > limit:
                break
    except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
        raise InvalidData(f"{where} could not be read ({' '.join(str(exc).split())[:300]}); check that every row has "
                          "the same number of fields and that numeric columns hold plain numbers.") from None
    finally:
        src.close()
    return rows


def _inspect_parquet(raw, *, where, spec, max_rows, max_label, setting) -> Inspection:
    fh = raw()
    try:
        with pq.ParquetFile(fh) as f:
            md = f.metadata
            check_row_limit(md.num_rows, max_rows, setting, where)
            types = {fld.name: fld.type for fld in f.schema_arrow}
            names = list(types)
            dup = sorted({n for n in names if names.count(n) > 1})
            if dup:
                raise InvalidData(f"{where} repeats the column name(s) {dup}; every column needs a distinct name.")
            if md.num_rows == 0:
                raise InvalidData(f"{where} has a header but no rows; send at least one row.")
            columns = _used(spec, types, where, sources.parquet_sample(f))
            batch = next(iter(f.iter_batches(batch_size=FIRST_ROWS, columns=columns)))
            first = from_arrow(pa.Table.from_batches([batch]), where=where, max_label=max_label, spec=spec)
            key = getattr(getattr(spec, "cv", None), "row_key", None)
            stats = constant_stats(md, key) if key in columns else None
    except (pa.ArrowException, OSError) as exc:
        reason = " ".join(str(exc).split())
        raise InvalidData(f"{where} could not be read as Parquet ({reason[:300]}); send a valid Parquet file or CSV.") from None
    finally:
        fh.close()
    kinds = {n: sources.arrow_kind(t) for n, t in types.items()}
    return Inspection(int(md.num_rows), kinds, columns, first, batch.num_rows == md.num_rows, True, stats)


def constant_stats(md, column: str) -> tuple | None:
    """(value,) when the footer's statistics show ``column`` holds one value in every row, else None."""
    names = [md.schema.column(i).name for i in range(md.num_columns)]
    if column not in names:
        return None
    j, seen = names.index(column), None
    for g in range(md.num_row_groups):
        rg = md.row_group(g)
        if rg.num_rows == 0:
            continue
        st = rg.column(j).statistics
        if st is None or not st.has_min_max or st.null_count != 0 or st.min != st.max:
            return None
        if seen is not None and seen[0] != st.min:
            return None
        seen = (st.min,)
    return seen


def read_for_job(read: dict[str, Any], raw, spec_raw: Any, limits: Any) -> Table:
    """The whole table of an in-memory job whose file the API process only looked at (``inspect_file``), read in
    the training process by the in-memory reader (``raw()`` opens the file) and checked by ``validate``:
    what only the whole table shows (a malformed cell past the first block, a constant target, too many
    levels, ...) fails the job with the problem the submission would have answered. ``read`` holds the
    name the caller gave the file (``where``) and the limits at submission."""
    from service.engine import parse_spec

    cols = from_file_bytes(raw, None, where=read["where"], max_label=read.get("max_label"), spec=parse_spec(spec_raw),
                           max_rows=read.get("max_rows"))
    sources.check_column_names(list(cols), "the training data")
    if limits is not None:  # None: read again to score the live version (if_better), checked when it trained
        validate(cols, spec_raw, limits)
    return cols


# ---- checking a table against the spec (both processes) ------------------------------------------------

def table_sha256(cols: Table) -> str:
    """SHA-256 of a table in a canonical form (names, dtypes and little-endian values, in column order)."""
    import hashlib

    h = hashlib.sha256()
    for name, arr in cols.items():
        if arr.dtype.kind in "UO":
            # text: the same bytes as when text columns were fixed-width "<U{longest}" arrays
            width = max(1, max(map(len, arr.tolist()), default=1))
            h.update(name.encode() + b"\x00" + f"<U{width}".encode() + b"\x00")
            h.update("\x1f".join(arr.tolist()).encode())
        else:
            h.update(name.encode() + b"\x00" + arr.dtype.str.encode() + b"\x00")
            h.update(np.ascontiguousarray(arr, dtype="<f8").tobytes())
        h.update(b"\x1e")
    return h.hexdigest()


def budget_of(limits: Any):
    """The engine's ``Budget`` from the server's limits (settings, or a namespace of their values)."""
    from service.engine.tune import Budget

    return Budget(max_grid_fits=limits.max_grid_fits, max_levels=limits.max_levels, max_job_cost=limits.max_job_cost)


def constant_row_key(column: str, value: Any, where: str):
    """The one refusal of a ``cv.row_key`` column holding a single value (memory and streamed paths)."""
    from service.errors import InvalidSpec

    if isinstance(value, np.generic):
        value = value.item()
    return InvalidSpec(
        f"cv.row_key={column!r} has the same value ({value!r}) in every row of {where}; hash folds would put every "
        "row in one fold: name a column that identifies rows, or leave row_key out to use row positions.",
        errors=[{"field": "cv.row_key", "value": column, "message": "constant column"}])


def more_folds_than_rows(folds: int, n: int):
    from service.errors import InvalidSpec

    return InvalidSpec(
        f"cv.folds={folds} is more than the {n} rows of the data; use at most {n} folds or send more rows.",
        errors=[{"field": "cv.folds", "value": folds, "message": "more folds than rows"}])


def validate(cols: Table, spec_raw: Any, limits: Any) -> tuple[dict[str, Any], dict[str, int]]:
    """Validate spec and data together exactly as the engine will; return the normalized spec and grid counts."""
    from service.engine import check_budget, parse_spec
    from service.engine.folds import uses_hash
    from service.engine.tune import prepare

    spec = parse_spec(spec_raw)
    budget = budget_of(limits)
    # The size checks first, from the shape alone (declared or numeric features, no one-hot columns yet);
    # then the checks that read the data, then the size checks again with the category columns counted.
    n_rows = len(next(iter(cols.values()))) if cols else 0
    d_guess = len(spec.features) if spec.features is not None else sum(
        1 for c, v in cols.items() if v.dtype.kind in "biuf" and c != spec.target)
    check_budget(spec, n_rows, d_guess, budget)
    prep = prepare(cols, spec, budget)
    n, d = prep.X.shape
    if spec.cv.scheme not in ("loo",) and spec.cv.folds > n:
        raise more_folds_than_rows(spec.cv.folds, n)
    counts = check_budget(spec, n, d, budget, prep.categories.width)
    if prep.keys is not None and uses_hash(spec.cv) and spec.cv.scheme == "kfold" and n > 1:
        keys = np.asarray(prep.keys)
        if (keys[:1] == keys).all():
            raise constant_row_key(spec.cv.row_key, keys[0], "the training data")
    return spec.model_dump(mode="json"), counts


def to_arrow(table: Table) -> pa.Table:
    out = pa.table({k: pa.array(v) for k, v in table.items()})
    unused = getattr(table, "unused_text", ())
    return out.replace_schema_metadata({UNUSED_TEXT_KEY: json.dumps(list(unused)).encode()}) if unused else out


def stage(table: Table, path: Path) -> Path:
    """Write ``table`` as Parquet at ``path`` atomically (temporary name, fsync, rename)."""
    tmp = path.with_name(path.name + ".part")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        pq.write_table(to_arrow(table), tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except OSError as exc:  # disk full, permissions, read-only: nothing half-written stays behind
        try:
            tmp.unlink(missing_ok=True)
        except OSError:  # a read-only file system refuses even this (EROFS) when nothing was written
            pass
        reason = getattr(exc, "strerror", None) or " ".join(str(exc).split())[:200]
        raise StorageFailure(
            f"the training data could not be staged in the store folder (TIKHON_STORE) ({paths.redact(reason)}); "
            "nothing was stored and no job was created. Free space in the store folder and submit again."
        ) from None
    return path


def read_staged(path: Path) -> Table:
    # checked when the job was accepted; a job staged before a lower cap still trains
    cols = from_parquet(Path(path), where="staged training data", max_label=None)
    meta = pq.read_schema(str(path)).metadata or {}
    if UNUSED_TEXT_KEY in meta:
        cols = Columns(cols)
        cols.unused_text = tuple(json.loads(meta[UNUSED_TEXT_KEY]))
    return cols
