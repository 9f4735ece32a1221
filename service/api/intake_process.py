"""Reading large JSON training bodies in a separate process, so the API process keeps serving.

A JSON body of training rows is costly to read in the interpreter: orjson builds one dict per row
(650,000 rows of a 37 MB body are ~2 million Python objects), and turning them into columns walks every
one of them. A worker thread does not help: the interpreter lock is held the whole time, and single-row
predictions on the same process wait for it. So a JSON training body larger than
``intake_process_bytes`` goes to a small pool of *intake processes* (``intake_processes``, started
when the first such body arrives, spawned, dying with the API process, at a lower CPU priority): as
the path of the file the route wrote it to while it arrived (a body with a declared length), or as
bytes (a chunked body). There ``read_json_body`` does what the API process would have done: parse,
validate the request's envelope and the spec's size, turn the rows (or CSV text) into columns, validate
them against the spec (the engine's own ``prepare`` and budget checks), and stage them as Parquet in
the store's incoming folder. Only a small summary comes back: the request's fields, the data's
description (rows, columns, sha256), the normalized spec and grid counts, and the staged file's path.

Errors keep their order and their problem details. An error of the body or of the spec's size is
returned as ``error`` with ``deferred`` False and answered at once; an error of the data or of its
validation comes back with ``deferred`` True, and the route raises it only after the checks that came
before reading the data (queue capacity, the live spec of a retrain without a spec), exactly as when the
body is read in the API process. Errors are ``TikhonError`` instances, which keep every field across
processes (``TikhonError.__reduce__``). Nothing is half-written: staging is atomic, and a staged file
that no job takes over (a refusal, an idempotent replay, a client that went away) is removed.
"""

from __future__ import annotations

import asyncio
import os
import types
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path
from typing import Any

from service.api.spawned import SpawnedPool
from service.errors import Busy, TikhonError


# The settings the intake reads (``intake.load_data``, ``check_spec_size``, ``validate``); passed to the
# intake process as a plain namespace of these values, not as the whole Settings object.
LIMITS = ("max_label_chars", "max_training_rows", "max_grid_fits", "max_levels", "max_job_cost",
          "max_spec_bytes", "max_spec_string_chars")


def limits_of(settings: Any) -> dict[str, Any]:
    return {k: getattr(settings, k) for k in LIMITS}


def read_json_body(body: bytes | str, limits: dict[str, Any], incoming: str, live_spec: Any = None) -> dict[str, Any]:
    """The whole in-memory intake of one JSON training body (runs in an intake process, or inline).
    ``body``: the bytes, or the path of the file they were written to (read, then removed).

    Returns ``{"request": {spec, promote, min_improvement, continue_from, old_weight}, "data": ...}`` plus,
    for rows or CSV data, ``origin``, ``spec`` and ``counts`` and ``staged`` (the Parquet file's path); or
    ``error`` with ``deferred``. A body without a spec is read and checked with ``live_spec`` (the live
    version's spec when the body arrived; ``checked_with`` says so, and the caller checks it is still the
    live one); with none, its data are left unread (``unread``): the caller answers that there is no spec
    to reuse. A continuation (``continue_from``) is read without a spec and staged unchecked (``spec`` and
    ``counts`` None): the caller checks the new rows against the parent version it names."""
    from service import tables
    from service.api import intake
    from service.api.routes.trainings import parse_training_body

    settings = types.SimpleNamespace(**limits)
    if isinstance(body, str):
        spooled = Path(body)
        try:
            body = spooled.read_bytes()
        finally:
            intake.discard(spooled)
    raw, body = body, None
    try:
        parsed, data = parse_training_body(raw)
        del raw
        intake.check_spec_size(parsed.spec, settings)
    except TikhonError as exc:
        return {"error": exc, "deferred": False}
    request = {"spec": parsed.spec, "promote": parsed.promote, "min_improvement": parsed.min_improvement,
               "continue_from": parsed.continue_from, "old_weight": parsed.old_weight}
    if not isinstance(data, dict) or not ("rows" in data or "csv" in data):
        return {"request": request, "data": data}  # a source: the route reads it (or streams it) itself
    kind = "rows" if "rows" in data else "csv"
    out: dict[str, Any] = {"request": request, "data": {"kind": kind}}
    continuing = parsed.continue_from is not None
    spec_raw = parsed.spec if parsed.spec is not None else live_spec
    if spec_raw is None and not continuing:
        out["unread"] = True
        return out
    if parsed.spec is None and not continuing:
        out["checked_with"] = spec_raw
    try:
        cols, origin = intake.load_data(data, settings, spec=None if continuing else intake.parse(spec_raw))
        data.clear()  # the row objects are columns now
        spec = counts = None
        if not continuing:
            spec, counts = intake.validate(cols, spec_raw, settings)
        path = tables.stage(cols, Path(incoming) / f"{os.urandom(16).hex()}-{intake.DATA_FILE}")
    except TikhonError as exc:
        out.update(error=exc, deferred=True)
        return out
    out.update(origin=origin, spec=spec, counts=counts, staged=str(path))
    return out


def validate_staged_file(path: str, spec_raw: Any, limits: dict[str, Any]) -> tuple[dict[str, Any], dict[str, int]]:
    """A staged table checked against a spec the body did not carry (a retrain reusing the live version's
    spec, known only after the body was read): ``validate`` on the table read back, in an intake process,
    so the API process never holds the table."""
    from service import tables

    return tables.validate(tables.read_staged(Path(path)), spec_raw, types.SimpleNamespace(**limits))


def _start(parent_pid: int) -> None:
    """Initializer of an intake process: die with the API process (an orphan would hold memory), and run
    at the training processes' lower CPU priority (``lifeline.TRAINING_NICENESS``): on a small host it
    shares the cores with the event loop, and reading a body can wait while predictions cannot."""
    from service.lifeline import die_with_parent as _die_with_parent, lower_priority as _lower_priority

    _die_with_parent(parent_pid)
    _lower_priority()


class IntakePool(SpawnedPool):
    """The API process's intake processes (``processes`` of them), started on first use."""

    def __init__(self, processes: int = 1):
        super().__init__(processes)

    def _initializer(self):
        return _start, (os.getpid(),)

    async def read_json(self, body: bytes | Path, settings: Any, incoming: Path, live_spec: Any = None
                        ) -> dict[str, Any]:
        """``read_json_body`` in an intake process, for the body's bytes or the file holding them (which
        is removed). A process that died (killed, out of memory) is replaced for the next body; this one
        is answered with a 429 problem to submit it again."""
        spooled = body if isinstance(body, Path) else None
        pool = self._executor()
        try:
            future = pool.submit(read_json_body, str(body) if spooled else body, limits_of(settings), str(incoming),
                                 live_spec)
        except BrokenProcessPool:
            self._drop(pool)
            _discard_file(spooled)
            raise self._broken() from None
        del body
        try:
            return await asyncio.wrap_future(future)
        except BrokenProcessPool:
            self._drop(pool)
            raise self._broken() from None
        except BaseException:  # the client went away: a file staged later is removed when it arrives
            future.add_done_callback(_discard_staged)
            raise
        finally:
            _discard_file(spooled)  # read and removed by the intake process, unless it never got to it

    def validate_staged(self, path: Path, spec_raw: Any, settings: Any) -> tuple[dict[str, Any], dict[str, int]]:
        """``validate_staged_file`` in an intake process, waited for (called from a worker thread); its
        ``TikhonError`` is raised here as it was raised there."""
        pool = self._executor()
        try:
            return pool.submit(validate_staged_file, str(path), spec_raw, limits_of(settings)).result()
        except BrokenProcessPool:
            self._drop(pool)
            raise self._broken() from None

    @staticmethod
    def _broken() -> Busy:
        return Busy("the process reading large training bodies ended before it finished this one (it was killed or "
                    "ran out of memory); nothing was stored and no job was created. Submit again, or send large "
                    "data as CSV or a Parquet upload (multipart field 'file').", retry_after=1)


def _discard_file(path: Path | None) -> None:
    if path is not None:
        from service.api import intake

        intake.discard(path)


def _discard_staged(future) -> None:
    from service.api import intake

    try:
        staged = (future.result() or {}).get("staged")
    except BaseException:  # noqa: BLE001 - nothing was staged
        return
    if staged:
        intake.discard(Path(staged))
