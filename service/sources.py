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
import contextlib
from typing import Any, Iterator

import numpy as np

from service.errors import InvalidData, SourceChanged
from service.filelist import HIVE_NULL, FileRef, list_source, native

PARTITION_ROWS = 1_000_000  # target rows per Parquet partition (whole row groups are never split)


# ---- the one reader: column kinds, conversion to numpy, and how a CSV's cells are typed ------------------
# Every path (JSON rows aside, which carry their own types) reads a table through these functions: a CSV
# body or upload and a CSV source in memory, and the same source streamed; Parquet the same way. So a
# column gets the same kind, the same values and the same verdict whichever path reads it.
NUMBER, BOOLEAN, TEXT, TIME, OTHER = "number", "boolean", "text", "time", "other"
CSV_TYPE_BLOCK = 1 << 20  # bytes: the first block of a CSV, where column types are decided (pyarrow's default)
CSV_MOSTLY = 0.5  # a text column whose non-empty cells are more than half number-like is a numeric column
# number-like: digits with an optional sign, decimal point, exponent, thousands separators, or hex (0x1A);
# such a cell in a column that is otherwise numeric is a malformed number, not a label (RE2 syntax)
_NUMBER_LIKE = r"^\s*[+-]?(\d[\d,_' ]*)?(\.\d*)?([eE][+-]?\d+)?\s*$|^\s*[+-]?0[xX][0-9a-fA-F]+\s*$"


def arrow_kind(t) -> str:
    """The one rule for an Arrow column type: "number" (integers, floats, decimals; read as float64),
    "boolean" (not a number: see ``service.engine.result.column_kind``), "text" (UTF-8 strings),
    "time" (dates and timestamps: only a ``cv.order_by`` column may hold them) or "other" (binary,
    lists, structs, all-empty columns...: read nowhere)."""
    import pyarrow.types as pt

    if pt.is_dictionary(t):
        t = t.value_type
    if pt.is_boolean(t):
        return BOOLEAN
    if pt.is_integer(t) or pt.is_floating(t) or pt.is_decimal(t):
        return NUMBER
    if pt.is_string(t) or pt.is_large_string(t):
        return TEXT
    if pt.is_date(t) or pt.is_timestamp(t):
        return TIME
    return OTHER


def text_roles(spec) -> set[str]:
    """Columns the spec reads as labels: always text, never converted to numbers (``zip`` 01 ≠ 1). ``spec``
    may also be the set of a model's categorical inputs (prediction tables)."""
    if spec is None:
        return set()
    if isinstance(spec, (set, frozenset, list, tuple)):
        return set(spec)
    return {c for c in (*spec.categorical, spec.cv.group_by) if c}


def number_roles(spec) -> set[str]:
    """Columns the spec reads as numbers: the target and listed features."""
    if spec is None or not hasattr(spec, "target"):
        return set()
    return {spec.target, *(spec.features or ())}


def unsupported(where: str, name: str, t, role: str | None = None) -> InvalidData:
    """The refusal of a column whose type the service does not read (same words on every path)."""
    import pyarrow.types as pt

    used = f" (used as {role})" if role else ""
    if pt.is_binary(t) or pt.is_large_binary(t):
        msg = (f"{where} column {name!r}{used} holds bytes that are not UTF-8 text (e.g. Latin-1 'caf\\xe9'); "
               "save the file as UTF-8")
    elif pt.is_null(t):
        msg = (f"{where} column {name!r}{used} has only missing values (every cell is empty); fill them in, or "
               "leave the column out")
    elif arrow_kind(t) == BOOLEAN:
        msg = (f"{where} column {name!r}{used} holds true/false values; encode it as 0/1 numbers or list it under "
               "'categorical'")
    else:
        msg = (f"{where} column {name!r}{used} has the type {t}, which the service does not read there; send "
               "numbers or text labels (dates as numbers, e.g. days since a fixed day; dates are read only as "
               "cv.order_by), or leave the column out of the spec")
    return InvalidData(msg, errors=[{"field": name, "value": str(t), "message": "type not read"}])


def _rows_text(rows: list[int]) -> str:
    shown = ", ".join(str(i) for i in rows[:5])
    return shown + (f" (and {len(rows) - 5} more)" if len(rows) > 5 else "")


def arrow_columns(batch, columns: list[str], *, where: str, offset: int = 0, text: set[str] = frozenset(),
                  max_label: int | None = None) -> dict[str, np.ndarray]:
    """Arrow columns -> numpy by the one rule: numbers as float64 (decimals too), text as object arrays of
    ``str`` (at most ``max_label`` characters), booleans as bool (as text "true"/"false" in a ``text``
    column), dates and timestamps as datetime64. Refused, naming the column and the first rows (counted
    from ``offset``): missing cells (null, empty; NaN and infinities in a number column), and types read
    nowhere (``unsupported``)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    out = {}
    for name in columns:
        col = batch.column(batch.schema.get_field_index(name))
        t = col.type
        kind = arrow_kind(t)
        if kind == OTHER:
            raise unsupported(where, name, t)
        if col.null_count:
            nulls = (np.flatnonzero(col.is_null().to_numpy(zero_copy_only=False)) + offset).tolist()
            raise InvalidData(
                f"{where} column {name!r} has missing values (empty, NA or null) at row(s) {_rows_text(nulls)} "
                "(rows counted from 0 after the header); fill them in or drop those rows.",
                errors=[{"field": name, "message": "missing values", "value": nulls[:20]}])
        if kind == NUMBER:
            if pa.types.is_decimal(t):  # through the decimal text: correctly rounded, as a CSV cell "29.98" is
                col = pc.cast(pc.cast(col, pa.string()), pa.float64())
            arr = np.asarray(pc.cast(col, pa.float64()).to_numpy(zero_copy_only=False), dtype=np.float64)
            bad = (np.flatnonzero(~np.isfinite(arr)) + offset).tolist()
            if bad:
                raise InvalidData(
                    f"{where} column {name!r} holds non-finite values (inf or NaN) at row(s) {_rows_text(bad)}; "
                    "send finite numbers or drop those rows.",
                    errors=[{"field": name, "message": "non-finite values", "value": bad[:20]}])
            out[name] = arr
        elif kind == BOOLEAN and name not in text:
            out[name] = np.asarray(col.to_numpy(zero_copy_only=False), dtype=bool)
        elif kind == TIME:
            out[name] = np.asarray(col.to_numpy(zero_copy_only=False))
        else:
            strings = pc.cast(col, pa.string())
            if kind == BOOLEAN:
                strings = pc.if_else(col, "true", "false")
            if max_label is not None and len(strings):
                lengths = pc.utf8_length(strings)
                if (pc.max(lengths).as_py() or 0) > max_label:
                    from service.errors import BudgetExceeded

                    row = int(np.flatnonzero(np.asarray(lengths.to_numpy(zero_copy_only=False)) > max_label)[0])
                    length = int(lengths[row].as_py())
                    raise BudgetExceeded(
                        f"{where} column {name!r} holds a label of {length:,} characters at row {row + offset} (rows "
                        f"counted from 0), above the limit max_label_chars={max_label}; category labels are short "
                        "names: shorten it, or raise TIKHON_MAX_LABEL_CHARS on the server.",
                        errors=[{"field": f"{where}[{row + offset}].{name}", "value": length,
                                 "message": "label too long"}],
                        limit="max_label_chars", allowed=max_label, received=length)
            out[name] = np.asarray(strings.to_numpy(zero_copy_only=False)).astype(object, copy=False)
    return out


def check_used(schema: dict[str, str], types: dict[str, Any], spec, where: str, sample=None
               ) -> tuple[list[str], list[str]]:
    """(features, used columns) of ``spec`` on a source whose columns have the kinds ``schema``; refuses a
    used column of a type it cannot be read as (the same verdict in memory and streamed, at submission).
    ``sample(names)``, when given, returns the first cells of text columns for
    ``service.engine.result.check_numeric_text`` (a text column of numbers must not vanish silently)."""
    from service.engine.result import check_numeric_text, unclaimed_text
    from service.engine.tune import resolve_columns

    features, used = resolve_columns(spec, schema)
    unclaimed = unclaimed_text(spec, schema)
    if unclaimed and sample is not None:
        for name, cells in sample(unclaimed).items():
            check_numeric_text(name, cells, where)
    numeric = {spec.target, *features}
    for name in used:
        kind = schema[name]
        role = ("target" if name == spec.target else "feature" if name in numeric else
                "cv.order_by" if name == spec.cv.order_by else None)
        if kind == OTHER or (kind == TIME and name != spec.cv.order_by) or (kind == BOOLEAN and name in numeric):
            raise unsupported(where, name, types[name], role)
    return features, used


def csv_types(first, spec) -> dict[str, Any]:
    """The Arrow type of every column of a CSV, decided from its first block ``first`` (a record batch
    read with pyarrow's own inference, ``text_roles`` forced to text):

    - the spec's label columns (categorical, cv.group_by): text, whatever their cells look like;
    - the target and listed features, and every column pyarrow read as integers or floats: float64, so a
      later ``55.5`` in a column of integers is a number, and a later malformed cell is refused by name;
    - a column pyarrow read as text whose non-empty cells are more than half number-like (``_NUMBER_LIKE``:
      ``1,234``, ``0x1A`` count): float64 too, so its malformed cells are refused rather than the column
      silently becoming text and being left out of the default features;
    - anything else as inferred (text, booleans, dates; binary and all-empty columns are read nowhere).
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    texts, numbers = text_roles(spec), number_roles(spec)
    types = {}
    for f in first.schema:
        name, t = f.name, f.type
        kind = arrow_kind(t)
        if name in texts:
            types[name] = t if (pa.types.is_binary(t) or pa.types.is_null(t)) else pa.string()
        elif name in numbers or kind == NUMBER:
            types[name] = pa.float64() if kind in (NUMBER, TEXT) else t
        elif kind == TEXT and _mostly_numbers(first.column(first.schema.get_field_index(name))):
            types[name] = pa.float64()
        else:
            types[name] = t
    return types


def _mostly_numbers(col) -> bool:
    import pyarrow.compute as pc

    col = col.drop_null() if hasattr(col, "drop_null") else col
    col = pc.filter(col, pc.not_equal(pc.utf8_trim_whitespace(col), ""))
    if len(col) == 0:
        return False
    like = pc.and_(pc.match_substring_regex(col, _NUMBER_LIKE), pc.match_substring_regex(col, r"\d"))
    return pc.sum(like).as_py() > CSV_MOSTLY * len(col)


def _csv_options(types: dict[str, Any] | None, columns: list[str] | None, block_size: int):
    import pyarrow.csv as pcsv

    convert = pcsv.ConvertOptions(strings_can_be_null=True,
                                  column_types={c: types[c] for c in (columns or types or {})} if types else None,
                                  include_columns=columns)
    return pcsv.ReadOptions(block_size=block_size, use_threads=False), convert


def csv_head(opener, spec, where: str) -> tuple[dict[str, str], dict[str, Any]]:
    """(kinds, Arrow types) of every column of the CSV that ``opener()`` opens (a path or a file object),
    decided from its first block (``csv_types``). A header without rows, an unreadable file, a compressed
    file and repeated names are refused here, before any row is converted."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    src = opener()
    try:
        head = _peek(src)
        if head[:2] == b"\x1f\x8b" or head[:4] == b"PK\x03\x04" or head[:3] == b"BZh" or head[:4] == b"\x28\xb5\x2f\xfd":
            raise InvalidData(f"{where} is compressed (gzip, zip, bzip2 or zstd bytes); Tikhon reads plain CSV text "
                              "or Parquet: decompress the file (e.g. gunzip) and send it again, or write it as Parquet",
                              errors=[{"field": where, "message": "compressed CSV is not read"}])
        texts = text_roles(spec)
        opts = pcsv.ReadOptions(block_size=CSV_TYPE_BLOCK, use_threads=False)
        try:
            reader = pcsv.open_csv(src, read_options=opts, convert_options=pcsv.ConvertOptions(
                strings_can_be_null=True))
            names = reader.schema.names
            check_column_names(names, "the training data" if spec is not None else where)
            _unique_where(names, where)
            reader.close()
            src = _reopen(src, opener)
            reader = pcsv.open_csv(src, read_options=opts, convert_options=pcsv.ConvertOptions(
                strings_can_be_null=True, column_types={c: pa.string() for c in texts if c in names}))
            try:
                first = reader.read_next_batch()
            except StopIteration:
                first = None
        except (pa.ArrowInvalid, pa.ArrowTypeError, UnicodeDecodeError) as exc:
            if "UTF8" in str(exc) or isinstance(exc, UnicodeDecodeError):
                raise _not_utf8(where) from None
            raise InvalidData(f"{where} could not be parsed as CSV ({' '.join(str(exc).split())[:300]}); send "
                              "comma-separated UTF-8 text with one header line and the same number of fields on "
                              "every line.") from None
        if first is None or first.num_rows == 0:
            raise InvalidData(f"{where} has a header but no rows; send at least one row.",
                              errors=[{"field": where, "message": "no rows"}])
        types = csv_types(first, spec)
        return {n: (NUMBER if arrow_kind(t) == NUMBER else arrow_kind(t)) for n, t in types.items()}, types
    finally:
        with contextlib.suppress(Exception):
            src.close()


def _peek(src) -> bytes:
    head = src.read(8)
    src.seek(0)
    return bytes(head)


def _reopen(src, opener):
    with contextlib.suppress(Exception):
        src.close()
    return opener()


def check_column_names(names: list[Any], where: str) -> None:
    """Refuse a blank column name: specs, predictions and answers name columns, and a blank one can
    neither be named nor told apart from another."""
    for i, name in enumerate(names):
        if not isinstance(name, str) or not name.strip():
            raise InvalidData(
                f"column {i + 1} of {where} has an empty name ({name!r}); give every column a name in the header, "
                "or drop the column.",
                errors=[{"field": f"columns[{i}]", "value": name, "message": "a column needs a non-empty name"}])


def _unique_where(names: list[str], where: str) -> None:
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InvalidData(f"{where} repeats the column name(s) {dup}; every column needs a distinct name.")


def csv_batches(opener, types: dict[str, Any], columns: list[str], *, where: str, text: set[str],
                block_size: int = CSV_TYPE_BLOCK, max_label: int | None = None
                ) -> Iterator[tuple[int, dict[str, np.ndarray]]]:
    """(first row, columns) of each block of the CSV, read with the types ``csv_types`` decided and
    converted by ``arrow_columns``. A cell that does not convert (``1,234`` in a numeric column, bytes
    that are not UTF-8) is refused naming its column, row and value."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    ropts, copts = _csv_options(types, columns, block_size)
    pos = 0
    src = opener()
    try:
        reader = pcsv.open_csv(src, read_options=ropts, convert_options=copts)
        while True:
            try:
                batch = reader.read_next_batch()
            except StopIteration:
                return
            cols = arrow_columns(batch, columns, where=where, offset=pos, text=text, max_label=max_label)
            yield pos, cols
            pos += batch.num_rows
    except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
        raise _bad_cell(opener, types, columns, where, str(exc)) from None
    finally:
        with contextlib.suppress(Exception):
            src.close()


def _bad_cell(opener, types, columns, where: str, reason: str) -> InvalidData:
    """Find the first cell of a numeric column that pyarrow could not convert (its message names no row)
    by reading those columns again as text, and say what is wrong with it and how to fix it."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.csv as pcsv

    if "UTF8" in reason or "UTF-8" in reason:
        return _not_utf8(where)
    numeric = [c for c in columns if pa.types.is_floating(types[c])]
    pos = 0
    src = opener()
    try:
        reader = pcsv.open_csv(src, read_options=pcsv.ReadOptions(block_size=CSV_TYPE_BLOCK, use_threads=False),
                               convert_options=pcsv.ConvertOptions(
                                   include_columns=numeric, column_types={c: pa.string() for c in numeric},
                                   strings_can_be_null=True))
        for batch in reader:
            for name in numeric:
                col = batch.column(batch.schema.get_field_index(name))
                try:
                    pc.cast(col, pa.float64())
                    continue
                except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                    pass
                for i, v in enumerate(col.to_pylist()):
                    if v is None:
                        continue
                    try:
                        pc.cast(pa.array([v]), pa.float64())
                    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                        return malformed_number(where, name, pos + i, v)
            pos += batch.num_rows
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        pass
    finally:
        with contextlib.suppress(Exception):
            src.close()
    return InvalidData(f"{where} could not be read ({' '.join(reason.split())[:300]}); check that every row has the "
                       "same number of fields and that numeric columns hold plain numbers.")


def _not_utf8(where: str) -> InvalidData:
    return InvalidData(f"{where} holds bytes that are not UTF-8 text (e.g. Latin-1 'caf\\xe9'); save the file as UTF-8 "
                       "(most spreadsheets offer 'CSV UTF-8'), or write it as Parquet",
                       errors=[{"field": where, "message": "not UTF-8"}])


def malformed_number(where: str, name: str, row: int, value: str) -> InvalidData:
    shown = value if len(value) <= 40 else value[:37] + "..."
    return InvalidData(
        f"{where} column {name!r} holds {shown!r} at row {row} (rows counted from 0 after the header), which is not a "
        "number, while the column is numeric; write plain numbers there (digits and one '.' as decimal point: 1234.5, "
        "not '1,234.5' nor hex such as '0x1A'), fill in or drop a missing value ('-', '?'), or list the column under "
        "'categorical' if it holds labels.",
        errors=[{"field": name, "row": row, "value": shown, "message": "not a number"}])


@dataclass(frozen=True)
class ParquetPart:
    ref: FileRef  # the file as fixed at submission; every read re-checks it (service.filelist)
    row_groups: tuple[int, ...]
    offset: int
    rows: int
    extra: tuple[tuple[str, str, str], ...] = ()  # Hive partition columns: (name, kind, value)
    text: tuple[str, ...] = ()  # label columns, read as text

    @property
    def path(self) -> str:
        return self.ref.path

    def read(self, columns: list[str], batch_rows: int) -> Iterator[dict[str, np.ndarray]]:
        import pyarrow.parquet as pq

        extra = {name: (kind, value) for name, kind, value in self.extra}
        stored = [c for c in columns if c not in extra]
        pos = self.offset
        with self.ref.open() as fh, native(fh) as source, pq.ParquetFile(source) as f:
            for batch in f.iter_batches(batch_size=batch_rows, row_groups=list(self.row_groups), columns=stored):
                out = arrow_columns(batch, stored, where=repr(self.ref.name), offset=pos, text=set(self.text))
                for name in columns:
                    if name in extra:
                        out[name] = _constant(*extra[name], batch.num_rows)
                yield {name: out[name] for name in columns}
                pos += batch.num_rows
            self.ref.check_stat(os.fstat(fh.fileno()))  # rewritten in place while this pass read it


def _constant(kind: str, value: str, rows: int) -> np.ndarray:
    if kind == "number":
        return np.full(rows, float(int(value)), dtype=np.float64)
    out = np.empty(rows, dtype=object)
    out[:] = value
    return out


@dataclass(frozen=True)
class CsvPart:
    ref: FileRef
    offset: int = 0
    types: tuple[tuple[str, str], ...] = ()  # (column, Arrow type name) decided from the file's first block
    text: tuple[str, ...] = ()

    @property
    def path(self) -> str:
        return self.ref.path

    def read(self, columns: list[str], batch_rows: int) -> Iterator[dict[str, np.ndarray]]:
        import pyarrow as pa

        types = {n: _alias(t) for n, t in self.types if n in columns}
        # about 64 bytes a row is a fair guess for numeric CSV; batches are cut by bytes, not rows
        where = f"the CSV file {self.ref.name!r}"

        def opener():  # every (re)reading goes through the file as fixed at submission, hashing what it reads
            return pa.PythonFile(self.ref.reader(), mode="r")

        try:
            for _, cols in csv_batches(opener, types, columns, where=where, text=set(self.text),
                                       block_size=max(1 << 20, batch_rows * 64)):
                yield cols
        except InvalidData as exc:
            if not isinstance(exc, SourceChanged):
                with self.ref.reader() as raw:
                    raw.finish()  # a file rewritten under the parser is reported as such, not as a parse error
            raise


def parquet_sample(f):
    """``sample(names)`` for ``check_used``: the first ``TEXT_SAMPLE`` cells of those columns of the open
    Parquet file ``f``."""
    def sample(names: list[str]) -> dict[str, list]:
        from service.engine.result import TEXT_SAMPLE

        batch = next(iter(f.iter_batches(batch_size=TEXT_SAMPLE, columns=names)), None)
        if batch is None:
            return {}
        return {n: batch.column(batch.schema.get_field_index(n)).to_pylist() for n in names}
    return sample


def _alias(name: str):
    import pyarrow as pa

    try:
        return pa.type_for_alias(name)
    except ValueError:  # a zoned timestamp ("timestamp[s, tz=UTC]"): read nowhere but as cv.order_by, in memory
        return pa.string()


def open_source(path: Path, spec=None) -> tuple[dict[str, str], list]:
    """(schema: column → "number" | "boolean" | "text" | "time" | "other", partitions) of a Parquet file,
    Parquet folder or CSV file, listed now (``service.filelist.list_source``, with the path's own folder as
    the root). ``spec`` (a ``TuneSpec``, a dict, or None) names the label columns, which are read as text,
    and lets the used columns be checked against their types."""
    path = Path(path)
    root = path if path.is_dir() else path.parent
    return open_files(list_source(root, path, where=repr(path.name)), spec)


def open_files(refs: list[FileRef], spec=None) -> tuple[dict[str, str], list]:
    """(schema, partitions) of exactly the files of a fixed list (Parquet files, or one CSV file); every
    file is opened through its ``FileRef``, which checks it is still the file that was listed."""
    if spec is not None and not hasattr(spec, "cv"):
        from service.engine.spec import parse_spec

        spec = parse_spec(spec)
    if len(refs) == 1 and refs[0].kind == "csv":
        import pyarrow as pa

        ref = refs[0]
        where = f"the CSV file {ref.name!r}"
        schema, types = csv_head(lambda: pa.PythonFile(ref.open(), mode="r"), spec, where)
        if spec is not None:
            check_used(schema, types, spec, where)
        return schema, [CsvPart(ref, 0, tuple((n, str(t)) for n, t in types.items()), tuple(sorted(text_roles(spec))))]
    if any(r.kind != "parquet" for r in refs):
        raise InvalidData("a source is one CSV file, one Parquet file or a folder of Parquet files")
    return _parquet(refs, spec)


def _unique(names: list[str], path: Path) -> None:
    seen = set()
    for n in names:
        if n in seen:
            raise InvalidData(f"column name {n!r} appears more than once in {path.name!r}; give every column a unique name")
        seen.add(n)


def _parquet(refs: list[FileRef], spec=None) -> tuple[dict[str, str], list[ParquetPart]]:
    import pyarrow.parquet as pq

    schema: dict[str, str] | None = None
    types: dict[str, str] = {}
    first = ""
    parts: list[ParquetPart] = []
    text = tuple(sorted(text_roles(spec)))
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
                    raise InvalidData(f"{ref.name!r} has a column {clash[0]!r} and lies under a partition folder of "
                                      "the same name; rename the column or the folder.")
                s = {fld.name: arrow_kind(fld.type) for fld in arrow} | {k: kinds[k] for k in keys}
                t = {fld.name: str(fld.type) for fld in arrow} | {k: f"partition folder ({kinds[k]})" for k in keys}
                if schema is None:
                    schema, types, first = s, t, ref.name
                    if spec is not None:
                        import pyarrow as pa

                        arrow_types = {fld.name: fld.type for fld in arrow} | {
                            k: pa.int64() if kinds[k] == "number" else pa.string() for k in keys}
                        stored = parquet_sample(f)
                        check_used(s, arrow_types, spec, repr(ref.name),
                                   lambda wanted: stored([n for n in wanted if n not in keys]))
                elif s != schema:
                    raise InvalidData(_schema_difference(first, types, schema, ref.name, t, s))
        extra = tuple((k, kinds[k], dict(ref.partition)[k]) for k in keys)
        group, rows = [], 0
        for g in range(md.num_row_groups):
            group.append(g)
            rows += md.row_group(g).num_rows
            if rows >= PARTITION_ROWS:
                parts.append(ParquetPart(ref, tuple(group), offset, rows, extra, text))
                offset += rows
                group, rows = [], 0
        if group:
            parts.append(ParquetPart(ref, tuple(group), offset, rows, extra, text))
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
