"""Accepting a training job: parse the data, validate it against the spec, stage it, enter the job.

All of it runs before the job exists, so bad input is refused with a 4xx problem and nothing is
stored: the staged file is written only after every check passed, and removed again when the catalog
refuses the job or answers with an earlier job of the same idempotency key.

The checks are the engine's own (``service.engine.tune.prepare``, the same function ``tune`` starts
with, and ``check_budget``), so a job that is accepted here does not fail later on its input.
"""

from __future__ import annotations

import math
import os
import re
import uuid
from pathlib import Path
from typing import Any

import orjson

from service import tables
from service.sources import check_column_names
from service.errors import BudgetExceeded, InvalidData, InvalidSpec, NotFound
from service.settings import Settings
from service.store.jobs import IDEMPOTENCY_KEY_RULE

DATA_FILE = "data.parquet"
IDEMPOTENCY_KEY_MAX = 255


table_sha256 = tables.table_sha256  # the one fingerprint of a table read at submission (service.tables)
constant_row_key = tables.constant_row_key


def check_spec_size(spec_raw: Any, settings: Settings) -> None:
    """Refuse a spec whose JSON text exceeds ``max_spec_bytes`` or that holds a string (a value or a key:
    units, column names, ...) longer than ``max_spec_string_chars``, naming the field. A spec is small
    (a few hundred bytes); it is stored with the job and the version, and read by every listing."""
    if spec_raw is None:
        return
    cap = settings.max_spec_string_chars
    stack: list[tuple[str, Any]] = [("spec", spec_raw)]
    while stack:
        path, v = stack.pop()
        if isinstance(v, str):
            if len(v) > cap:
                raise BudgetExceeded(
                    f"{path} is a string of {len(v):,} characters, above the limit max_spec_string_chars={cap:,}; "
                    "a spec names columns and units in short strings: shorten it (or raise "
                    "TIKHON_MAX_SPEC_STRING_CHARS on the server).",
                    errors=[{"field": path, "value": len(v), "message": "string too long"}],
                    limit="max_spec_string_chars", allowed=cap, received=len(v))
        elif isinstance(v, dict):
            for k, x in v.items():
                key = str(k)
                if len(key) > cap:
                    stack.append((f"{path} (a key)", key))
                    continue
                stack.append((f"{path}.{key}", x))
        elif isinstance(v, list):
            stack.extend((f"{path}[{i}]", x) for i, x in enumerate(v))
    size = len(orjson.dumps(spec_raw))
    if size > settings.max_spec_bytes:
        raise BudgetExceeded(
            f"spec is {size:,} bytes as JSON, above the limit max_spec_bytes={settings.max_spec_bytes:,}; list fewer "
            "strengths (use {\"min\", \"max\", \"count\"}), features or units (or raise TIKHON_MAX_SPEC_BYTES).",
            errors=[{"field": "spec", "value": size, "message": "spec too large"}],
            limit="max_spec_bytes", allowed=settings.max_spec_bytes, received=size)


def load_data(data: dict[str, Any] | None, settings: Settings, *, upload: tuple[bytes | Path, str | None] | None = None,
              spec: Any = None) -> tuple[tables.Table, dict[str, Any]]:
    """(columns, a description of where they came from) for one of rows / csv / source / an upload.

    With the training ``spec`` (a ``TuneSpec``), CSV and Parquet are read by the one reader the streamed
    path uses (``service.sources``): only the columns the spec uses, label columns as text, and a file's
    rows counted (Parquet: from its footer) against ``max_training_rows`` before they are converted."""
    cap = settings.max_training_rows
    if upload is not None:
        payload, filename = upload
        cols = tables.from_file_bytes(payload, filename, where="the uploaded file", max_label=settings.max_label_chars,
                                      spec=spec, max_rows=cap)
        origin = {"kind": "upload", "filename": filename}
    elif "rows" in data:
        rows = data["rows"]
        if isinstance(rows, list):
            tables.check_row_limit(len(rows), settings.max_training_rows, "max_training_rows", "data.rows")
        cols = tables.from_rows(rows, where="data.rows", max_label=settings.max_label_chars)
        origin = {"kind": "rows"}
    elif "csv" in data:
        cols = tables.from_csv(data["csv"], where="data.csv", max_label=settings.max_label_chars, spec=spec,
                               max_rows=cap)
        origin = {"kind": "csv"}
    else:
        path = tables.resolve_source(Path(settings.data_dir), data["source"])
        cols = tables.read_source(path, where=f"data.source={data['source']!r}", max_label=settings.max_label_chars,
                                  spec=spec, max_rows=cap)
        origin = {"kind": "source", "source": data["source"]}
    check_column_names(list(cols), "the training data")
    n = len(next(iter(cols.values())))
    tables.check_row_limit(n, settings.max_training_rows, "max_training_rows", "the training data")
    origin.update(rows=n, columns=list(cols), sha256=table_sha256(cols))
    return cols, origin


def stream_source(data: dict[str, Any] | None, spec_raw: dict[str, Any] | None, settings: Settings
                  ) -> Path | None:
    """The resolved path when a ``source`` job is to be trained out of core, else None.

    Out of core when the spec says ``execution.mode: streaming``, or says ``auto`` (the default) and the
    source is a folder of Parquet files or its table would take more than ``streaming_threshold_bytes`` in
    memory: rows × columns × 8 bytes, the rows from the Parquet footer (a small, highly compressed file
    can hold many rows) or, for CSV, estimated from the file size (``table_bytes``). Nothing is parsed."""
    if not data or "source" not in data:
        return None
    path = tables.resolve_source(Path(settings.data_dir), data["source"], allow_dir=True)
    mode = ((spec_raw or {}).get("execution") or {}).get("mode", "auto") if isinstance(spec_raw, dict) else "auto"
    if mode == "streaming" or (mode == "auto" and (path.is_dir() or table_bytes(path) > settings.streaming_threshold_bytes)):
        return path
    if path.is_dir():
        raise InvalidData(
            f"data.source={data['source']!r} is a folder, which is read out of core; set spec.execution.mode to "
            "'streaming' or 'auto', or name a single file.",
            errors=[{"field": "spec.execution.mode", "value": mode, "message": "folder sources stream"}])
    return None


SHOWN_FILES = 100  # files listed in a job's ``data.files`` (all of them are stored with the job)
CSV_SCAN_BYTES = 8 << 20  # bytes of a streamed CSV read at submission to check the target's cells


def table_bytes(path: Path) -> int:
    """The memory a source file's table would take as float64 columns, from metadata only: a Parquet file's
    footer (rows × columns × 8); for CSV, rows estimated from the size and the mean length of the lines in
    its first 64 KiB, times the header's columns × 8. A file that is neither (or unreadable) counts by its
    size; reading it says why."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(1 << 16)
        if head[:4] == b"PAR1":
            import pyarrow.parquet as pq

            md = pq.read_metadata(str(path))
            return int(md.num_rows) * max(1, md.num_columns) * 8
        lines = head.split(b"\n")
        columns = lines[0].count(b",") + 1
        full = max(1, len(lines) - 1)  # complete lines in the head
        per_line = max(1.0, (len(head) - len(lines[-1])) / full)
        return int(path.stat().st_size / per_line) * columns * 8
    except Exception:  # noqa: BLE001 (the reader refuses it with a clear message later)
        return path.stat().st_size


def validate_stream(path: Path, spec_raw: dict[str, Any], settings: Settings, source: str
                    ) -> tuple[dict[str, Any], dict[str, int], dict[str, Any], list[dict[str, Any]]]:
    """Check an out-of-core job before it is queued: fix its file list (``service.filelist``), open every
    file, check the spec against the columns and the grid against the budget (rows from the Parquet
    footers, or estimated from a CSV's size), and refuse what the metadata already shows will fail: no
    rows, fewer rows than folds, a constant ``cv.row_key``, a CSV target with cells that are not numbers
    (in its first ``CSV_SCAN_BYTES``). Returns (spec, grid counts, the job's ``data`` view, the file list)."""
    from service.engine import parse_spec
    from service.engine.streaming import check_partitions
    from service.filelist import list_source
    from service.sources import open_files

    where = f"data.source={source!r}"
    spec = parse_spec(spec_raw)
    refs = list_source(settings.data_dir, path, where=where, max_files=settings.max_source_files)
    schema, parts = open_files(refs, spec)  # opens every file: a damaged footer or mixed columns are refused now
    check_column_names(list(schema), where)
    _first_block(parts, schema, spec)
    exact = all(r.kind == "parquet" for r in refs)
    rows = sum(r.rows or 0 for r in refs) if exact else _csv_rows_estimate(refs[0].path)
    counted = rows
    if not exact:
        counted = _scan_csv(refs[0], spec, where, rows)
        rows = rows if counted is None else counted
    _check_row_count(counted, spec, where, len(refs), exact)
    try:
        counts = check_partitions(schema, spec, rows, _budget(settings))
    except InvalidSpec as err:
        if path.is_dir() and any(e.get("field") == "cv.scheme" for e in err.errors):
            raise InvalidSpec(
                f"cv.scheme {spec.cv.scheme!r} needs all rows in memory, and {where} is a folder, which is always "
                "read out of core; use cv.scheme 'kfold' or 'grouped', or combine the files into one Parquet file "
                "and train it with execution.mode 'memory'.", errors=err.errors) from None
        raise
    if spec.cv.row_key and spec.cv.scheme == "kfold" and exact:
        _check_row_key(refs, spec.cv.row_key, where)
    origin = {"kind": "source", "source": source, "execution": "streaming", "rows": rows,
              "columns": list(schema), "bytes": sum(r.size for r in refs),
              "modified": max(r.mtime_ns for r in refs) / 1e9, "file_count": len(refs),
              "files": [{"name": r.name, "bytes": r.size, "rows": r.rows} for r in refs[:SHOWN_FILES]]}
    return spec.model_dump(mode="json"), counts, origin, [r.to_json() for r in refs]


def _csv_rows_estimate(path: str) -> int:
    """Rows of a CSV file estimated from its size and its first 64 KiB."""
    size = os.path.getsize(path)
    with open(path, "rb") as fh:
        head = fh.read(1 << 16)
    lines = max(1, head.count(b"\n"))
    return int(size / (len(head) / lines)) if head else 0


def _check_row_count(rows: int | None, spec, where: str, files: int, parquet: bool) -> None:
    """Refuse a source with no rows, or fewer rows than folds (the in-memory check), when the count is exact:
    from the Parquet footers, or from a CSV read whole at submission (``rows`` None: not known)."""
    if rows is None:
        return
    how = "counted in the Parquet footers" if parquet else "counted in the CSV file"
    if rows == 0:
        raise InvalidData(
            f"{where} holds no rows ({how}: 0 rows in {files} file(s)); point the source at files with data.",
            errors=[{"field": "data.source", "value": rows, "message": "no rows"}])
    if spec.cv.folds > rows:
        raise InvalidSpec(
            f"cv.folds={spec.cv.folds} is more than the {rows} row(s) of {where} ({how}); "
            f"use at most {rows} folds or send more rows.",
            errors=[{"field": "cv.folds", "value": spec.cv.folds, "message": "more folds than rows"}])


def _check_row_key(refs, column: str, where: str) -> None:
    """Refuse a ``cv.row_key`` that the footers' statistics show holds one value in every row (every row would
    hash to one fold). Row groups without statistics leave the question open, and the job decides."""
    import pyarrow.parquet as pq

    seen = None
    for ref in refs:
        if column in dict(ref.partition):
            values = {dict(r.partition).get(column) for r in refs}
            if len(values) > 1:
                return
            seen = ("partition", next(iter(values)))
            continue
        with ref.open() as fh:
            md = pq.ParquetFile(fh).metadata
        if column not in [md.schema.column(i).name for i in range(md.num_columns)]:
            return  # the spec check names the missing column
        if md.num_rows == 0:
            continue
        one = tables.constant_stats(md, column)  # (value,) when every row group holds that one value
        if one is None or (seen is not None and seen[1] != one[0]):
            return
        seen = ("stats", one[0])
    if seen is not None:
        raise constant_row_key(column, seen[1], where)


def _scan_csv(ref, spec, where: str, estimate: int) -> int | None:
    """Read the first ``CSV_SCAN_BYTES`` of a streamed CSV (the target and ``cv.row_key`` columns, as text):
    refuse the first target cell that is not a finite number (the job would fail on it after queueing),
    and, when that was the whole file, a ``cv.row_key`` with one value in every row. Returns the exact row
    count when the whole file was read, else None (the estimate is used for the budget only)."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    with ref.open() as fh:
        head = fh.read(CSV_SCAN_BYTES)
    whole = len(head) < CSV_SCAN_BYTES
    if not whole:  # only whole lines
        head = head[: head.rfind(b"\n") + 1]
    key = spec.cv.row_key if spec.cv.scheme == "kfold" else None
    wanted = [c for c in dict.fromkeys([spec.target, key]) if c]
    try:
        table = pcsv.read_csv(pa.py_buffer(head), read_options=pcsv.ReadOptions(block_size=max(1 << 20, len(head) + 1)),
                              convert_options=pcsv.ConvertOptions(include_columns=wanted,
                                                                  column_types={c: pa.string() for c in wanted},
                                                                  strings_can_be_null=False))
    except Exception:  # a ragged or undecodable head: the job reports it with its line
        return None
    cells = table.column(spec.target).to_pylist()
    for i, cell in enumerate(cells):
        try:
            ok = cell is not None and cell.strip() != "" and math.isfinite(float(cell))
        except ValueError:
            ok = False
        if not ok:
            shown = "" if cell is None else cell[:40]
            raise InvalidData(
                f"{where} column {spec.target!r} (the target) holds {shown!r} at row {i} (rows counted from 0 after "
                "the header), which is not a finite number; the target must be a number in every row: fix or drop "
                "that row, or name another target.",
                errors=[{"field": f"{spec.target}[{i}]", "value": shown, "message": "not a number"}])
    if not whole:
        return None
    if key and len(cells) > 1:
        keys = table.column(key).to_pylist()
        if all(k == keys[0] for k in keys):
            raise constant_row_key(key, keys[0], where)
    return len(cells)


FIRST_BLOCK_ROWS = 16_384


def _first_block(parts: list, schema: dict[str, str], spec) -> None:
    """Read the first block of a streamed source through the one reader at submission (bounded: one CSV
    block or ``FIRST_BLOCK_ROWS`` Parquet rows of the used columns), so a malformed cell, an empty label
    or a missing key there is refused with a 422 as in memory, not as a failed job."""
    from service.engine.streaming import check_batch
    from service.engine.tune import resolve_columns

    _, used = resolve_columns(spec, schema)
    for part in parts:
        if getattr(part, "rows", 1):
            batch = next(iter(part.read(used, FIRST_BLOCK_ROWS)), None)
            if batch is not None:
                check_batch(schema, spec, batch, part.offset)
            return


# ---- a file larger than INLINE_FILE_BYTES: a bounded look here, the whole table in the worker ------------
INLINE_FILE_BYTES = 1 << 20  # an upload or in-memory source this small is read whole at submission ...
INLINE_TABLE_BYTES = 16 << 20  # ... when its table (rows x columns x 8, from the footer or estimated) is this small


def read_at_submission(path: Path) -> bool:
    """Whether a training file is read whole in the API process (as JSON bodies up to ``intake_process_bytes``
    are): a file of at most ``INLINE_FILE_BYTES`` whose table takes at most ``INLINE_TABLE_BYTES``. A larger one
    is only looked at here (``check_file``) and read by the worker's training process."""
    return path.stat().st_size <= INLINE_FILE_BYTES and table_bytes(path) <= INLINE_TABLE_BYTES


def source_file(data: dict[str, Any], settings: Settings):
    """(path, where, FileRef) of an in-memory ``source`` file, fixed now: the worker reads exactly this file
    and refuses it when it changed (``service.filelist``). Compressed and unreadable files are refused in the
    in-memory reader's words."""
    from service.filelist import compressed_refusal, compression_of, ref_of

    where = f"data.source={data['source']!r}"
    path = tables.resolve_source(Path(settings.data_dir), data["source"])
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
        fmt = compression_of(head)
        if fmt:
            raise compressed_refusal(where, fmt)
        return path, where, ref_of(settings.data_dir, path, "parquet" if head[:4] == b"PAR1" else "csv")
    except OSError as exc:
        raise InvalidData(f"{where} cannot be read ({exc.strerror or type(exc).__name__}); check the file's "
                          "permissions in the data folder (TIKHON_DATA_DIR).") from None


def check_file(raw, spec_raw: dict[str, Any], settings: Settings, where: str
               ) -> tuple[dict[str, Any], dict[str, int], dict[str, Any], dict[str, Any]]:
    """The submission's checks of a training file the worker will read whole (``raw()`` opens it), in bounded
    memory: ``tables.inspect_file`` (compression, header, column types, the first block's cells, the row count
    against ``max_training_rows``), the first block through the scan's checks (empty labels, missing row
    keys), and what the count and the spec decide (no rows, more folds than rows, the grid's size from the
    shape, a ``cv.row_key`` that the Parquet statistics show is constant). Returns (spec, grid counts, the
    job's ``data`` additions, the worker's reading instructions)."""
    from service.engine import check_budget, parse_spec
    from service.engine.folds import uses_hash
    from service.engine.streaming import check_batch
    from service.sources import BOOLEAN, NUMBER

    spec = parse_spec(spec_raw)
    budget = _budget(settings)
    info = tables.inspect_file(raw, where=where, spec=spec, max_rows=settings.max_training_rows,
                               max_label=settings.max_label_chars)
    check_column_names(info.columns, "the training data")
    check_batch(info.kinds, spec, info.head, 0)
    n = info.rows
    d_guess = len(spec.features) if spec.features is not None else sum(
        1 for c in info.columns if info.kinds[c] in (NUMBER, BOOLEAN) and c != spec.target)
    check_budget(spec, n, d_guess, budget)
    if spec.cv.scheme != "loo" and spec.cv.folds > n:
        raise tables.more_folds_than_rows(spec.cv.folds, n)
    if (info.key_values is not None and uses_hash(spec.cv) and spec.cv.scheme == "kfold" and n > 1):
        raise constant_row_key(spec.cv.row_key, info.key_values[0], "the training data")
    counts = check_budget(spec, n, d_guess, budget)
    seen = {"execution": "memory", "rows": n, "columns": info.columns}
    reading = {"where": where, "max_rows": settings.max_training_rows, "max_label": settings.max_label_chars}
    return spec.model_dump(mode="json"), counts, seen, reading


def live_spec(store, name: str) -> dict[str, Any]:
    """The spec of the model's live version (a retrain without a spec reuses it)."""
    try:
        live = store.live_version(name)
    except NotFound:
        live = None
    if live is None:
        raise InvalidSpec(
            f"the request has no 'spec' and model {name!r} has no live version whose spec could be reused; "
            "send a spec, at least {\"target\": \"<column>\"}.",
            errors=[{"field": "spec", "message": "missing"}],
        )
    manifest = store.get_manifest(name, live, cv_table=False)
    spec = (manifest.get("training") or {}).get("spec")
    if not isinstance(spec, dict):
        raise InvalidSpec(f"the live version {live} of {name!r} keeps no reusable spec; send a spec with the request.")
    return spec


def check_continuation(parsed: Any) -> dict[str, Any] | None:
    """``{"continue_from", "old_weight"}`` of a continued-training request, None for any other; refuses
    ``old_weight`` without ``continue_from`` and a spec beside it (the parent's spec is kept)."""
    from service.errors import InvalidRequest

    version, weight = getattr(parsed, "continue_from", None), getattr(parsed, "old_weight", None)
    if version is None:
        if weight is not None:
            raise InvalidRequest(f"old_weight={weight:g} applies to a continued training only; send continue_from "
                                 "(the version to continue) too, or leave old_weight out.",
                                 errors=[{"field": "old_weight", "value": weight, "message": "needs continue_from"}])
        return None
    if parsed.spec is not None:
        raise InvalidRequest(f"a continued training (continue_from={version}) keeps the spec of the version it "
                             "continues; leave spec out, or train from scratch with a new spec and no continue_from.",
                             errors=[{"field": "spec", "message": "not allowed with continue_from"}])
    return {"continue_from": int(version), "old_weight": 1.0 if weight is None else float(weight)}


def continuation_parent(store, name: str, version: int) -> dict[str, Any]:
    """The engine body of the version a continuation starts from (the CV table left out), checked to be
    continuable (``engine.continued.check_parent``: a problem saying why not and what to do)."""
    from service.engine.continued import check_parent

    manifest = store.get_manifest(name, version, cv_table=False)  # NotFound (404) for a missing version
    body = dict(manifest.get("training") or {})
    check_parent(body, f"version {version} of {name!r}")
    body["_label"] = f"version {version} of {name!r}"
    return body


def continuation_streamed(settings: Settings) -> InvalidData:
    from service.errors import InvalidRequest

    return InvalidRequest(
        "a continued training reads its new rows in memory, and this source would be read out of core (a folder, or "
        f"a table above streaming_threshold_bytes={settings.streaming_threshold_bytes:,}); send the new rows as one "
        "file below that size, or train from scratch out of core.",
        errors=[{"field": "data.source", "message": "continued training reads the new rows in memory"}])


def validate_new_rows(cols: tables.Table, parent: dict[str, Any], settings: Settings
                      ) -> tuple[dict[str, Any], dict[str, int]]:
    """The parent's spec and the grid counts for a continuation's new rows, refused as the engine would
    refuse them (another column set, unreadable values, the budget)."""
    from service.engine.continued import check_new_rows

    counts = check_new_rows(parent, cols, _budget(settings), parent.get("_label", "the parent version"))
    return parse(parent["spec"]).model_dump(mode="json"), counts


def validate(cols: tables.Table, spec_raw: dict[str, Any], settings: Settings) -> tuple[dict[str, Any], dict[str, int]]:
    """Validate spec and data together exactly as the engine will (``tables.validate``, which the worker's
    training process runs too on a file it parses); return the normalized spec and grid counts."""
    return tables.validate(cols, spec_raw, settings)


def _budget(settings: Settings):
    return tables.budget_of(settings)


def check_idempotency_key(key: str | None) -> str | None:
    """Checked before any work (the catalog applies the same rule, IDEMPOTENCY_KEY_RULE, again)."""
    if key is None:
        return None
    if not re.fullmatch(IDEMPOTENCY_KEY_RULE, key):
        raise InvalidData(
            f"the Idempotency-Key header must be 1-{IDEMPOTENCY_KEY_MAX} printable ASCII characters without spaces, "
            f"got {len(key)} characters; use e.g. a UUID per logical submission.",
            errors=[{"field": "header.Idempotency-Key", "message": "1-255 printable ASCII characters, no spaces"}],
        )
    return key


def discard(path: Path) -> None:
    """Remove a staged file that no job took over; a store that refuses even that (read-only, gone) leaves it
    to the start-up sweep rather than replacing the submission's own answer with a clean-up error."""
    try:
        Path(path).unlink(missing_ok=True)
    except OSError:
        pass


def stage(store, cols: tables.Table) -> Path:
    """Write the validated table under the store's job area; the job's folder takes it over on submit."""
    return tables.stage(cols, Path(store.jobs.incoming_dir) / f"{uuid.uuid4().hex}-{DATA_FILE}")


def parse(spec_raw: Any):
    """The ``TuneSpec`` of a request's spec (``InvalidSpec`` when it is not one)."""
    from service.engine import parse_spec

    return parse_spec(spec_raw)
