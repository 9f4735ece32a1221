"""Accepting a training job: parse the data, validate it against the spec, stage it, enter the job.

All of it runs before the job exists, so bad input is refused with a 4xx problem and nothing is
stored: the staged file is written only after every check passed, and removed again when the catalog
refuses the job or answers with an earlier job of the same idempotency key.

The checks are the engine's own (``service.engine.tune.prepare``, the same function ``tune`` starts
with, and ``check_budget``), so a job that is accepted here does not fail later on its input.
"""

from __future__ import annotations

import hashlib
import re
import uuid
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from service.api import tables
from service.errors import BudgetExceeded, InvalidData, InvalidSpec, NotFound
from service.settings import Settings
from service.store.jobs import IDEMPOTENCY_KEY_RULE

DATA_FILE = "data.parquet"
IDEMPOTENCY_KEY_MAX = 255


def table_sha256(cols: tables.Table) -> str:
    """SHA-256 of a table in a canonical form (names, dtypes and little-endian values, in column order)."""
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


def check_column_names(names: list[Any], where: str) -> None:
    """Refuse a blank column name: specs, predictions and answers name columns, and a blank one can
    neither be named nor told apart from another."""
    for i, name in enumerate(names):
        if not isinstance(name, str) or not name.strip():
            raise InvalidData(
                f"column {i + 1} of {where} has an empty name ({name!r}); give every column a name in the header, "
                "or drop the column.",
                errors=[{"field": f"columns[{i}]", "value": name, "message": "a column needs a non-empty name"}])



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
                    ) -> tuple[dict[str, Any], dict[str, int], dict[str, Any]]:
    """Check an out-of-core job before it is queued: the source opens, the spec fits its columns, the
    grid fits the budget (rows from Parquet metadata, or estimated from a CSV's size)."""
    from service.engine import parse_spec
    from service.engine.streaming import check_partitions
    from service.sources import open_source

    spec = parse_spec(spec_raw)
    schema, parts = open_source(path, spec)
    check_column_names(list(schema), f"data.source={source!r}")
    _first_block(parts, schema, spec)
    rows = sum(getattr(p, "rows", 0) or 0 for p in parts)
    if not rows:  # CSV: estimate from the size and the first lines
        with open(path, "rb") as fh:
            head = fh.read(1 << 16)
        lines = max(1, head.count(b"\n"))
        rows = int(path.stat().st_size / (len(head) / lines)) if head else 0
    counts = check_partitions(schema, spec, rows, _budget(settings))
    files = sorted(path.iterdir()) if path.is_dir() else [path]
    origin = {"kind": "source", "source": source, "execution": "streaming", "rows": rows,
              "columns": list(schema), "bytes": sum(f.stat().st_size for f in files if f.is_file()),
              "modified": max(f.stat().st_mtime for f in files if f.is_file())}
    return spec.model_dump(mode="json"), counts, origin


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
    spec = (manifest.get("model") or {}).get("spec")
    if not isinstance(spec, dict):
        raise InvalidSpec(f"the live version {live} of {name!r} keeps no reusable spec; send a spec with the request.")
    return spec


def validate(cols: tables.Table, spec_raw: dict[str, Any], settings: Settings) -> tuple[dict[str, Any], dict[str, int]]:
    """Validate spec and data together exactly as the engine will; return the normalized spec and grid counts."""
    from service.engine import check_budget, parse_spec
    from service.engine.tune import prepare

    spec = parse_spec(spec_raw)
    budget = _budget(settings)
    # The size checks first, from the shape alone (declared or numeric features, no one-hot columns yet);
    # then the checks that read the data, then the size checks again with the category columns counted.
    n_rows = len(next(iter(cols.values()))) if cols else 0
    d_guess = len(spec.features) if spec.features is not None else sum(
        1 for c, v in cols.items() if v.dtype.kind in "biuf" and c != spec.target)
    check_budget(spec, n_rows, d_guess, budget)
    prep = prepare(cols, spec, budget)
    n, d = prep.X.shape
    if spec.cv.scheme not in ("loo",) and spec.cv.folds > n:
        raise InvalidSpec(
            f"cv.folds={spec.cv.folds} is more than the {n} rows of the data; use at most {n} folds or send more rows.",
            errors=[{"field": "cv.folds", "value": spec.cv.folds, "message": "more folds than rows"}],
        )
    counts = check_budget(spec, n, d, budget, prep.categories.width)
    return spec.model_dump(mode="json"), counts


def _budget(settings: Settings):
    from service.engine.tune import Budget

    return Budget(max_grid_fits=settings.max_grid_fits, max_levels=settings.max_levels,
                  max_job_cost=settings.max_job_cost)


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
