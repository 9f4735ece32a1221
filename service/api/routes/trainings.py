"""Training jobs: submit (JSON or multipart), read, list, cancel. Training itself runs in a worker."""

from __future__ import annotations

import contextlib
import uuid
from pathlib import Path as FsPath
from typing import Any

from anyio import to_thread
from fastapi import APIRouter, Path, Query, Request
from fastapi.responses import Response

from service import tables
from service.api import answers as A, auth, intake
from service.problems import MalformedBody, UnsupportedMediaType
from service.api.render import media_type, parse_json
from service.api.schemas import TrainingRequest, TrainingUpload, parse_training_request, schema_ref
from service.api.views import job_view
from service.errors import Busy, InvalidData, StorageFailure, TikhonError
from service.store.jobs import SUBMITTER
from service.api.dependencies import ModelName, StoreDep
from service.store.names import validate_name

router = APIRouter(prefix="/v1", tags=["trainings"])


# Marks a 202 that returns the job of an earlier submission with the same Idempotency-Key.
REPLAYED = "Tikhon-Replayed"

_SUBMIT_DOC = {
    **auth.TRAIN["openapi_extra"],
    "parameters": [{
        "name": "Idempotency-Key", "in": "header", "required": False, "schema": {"type": "string", "maxLength": 255},
        "description": "A repeated submission with the same key returns the first job instead of starting another.",
    }],
    "requestBody": {"required": True, "content": {
        "application/json": {"schema": schema_ref(TrainingRequest)},
        "multipart/form-data": {"schema": schema_ref(TrainingUpload)},
    }},
    "responses": {"202": {"description": "The job (new, or the first one with this Idempotency-Key).",
                          "headers": {"Location": {"schema": {"type": "string"}},
                                      REPLAYED: {"schema": {"type": "string", "enum": ["true"]},
                                                 "description": "Present when this answer is the first job of "
                                                 "a repeated Idempotency-Key (nothing new was started)."}}}},
    # the 202 body's schema comes from the route's ``responses`` (the Job model)
}


OFF_LOOP_BYTES = 65_536  # a JSON body larger than this is parsed and validated in a worker thread
# (and one larger than settings.intake_process_bytes in an intake process: service.api.intake_process)
_UPLOAD_CHUNK = 1 << 20


def parse_training_body(raw: bytes) -> tuple[TrainingRequest, dict[str, Any]]:
    body = parse_json(raw)
    data = body.get("data") if isinstance(body, dict) else None
    if isinstance(data, dict) and isinstance(data.get("rows"), list) and data["rows"]:
        # Validate the envelope with an empty row list: the model would copy every row object (twice the
        # memory of a large body); the rows themselves are checked, row by row, when read as a table.
        parsed = parse_training_request({**body, "data": {**data, "rows": []}})
        return parsed, data
    parsed = parse_training_request(body)
    return parsed, body["data"]


def _save_upload(source, target: FsPath) -> None:
    """Copy the uploaded file (Starlette spools it to a temporary file) into ``target`` in 1 MiB chunks."""
    source.seek(0)
    with open(target, "xb") as out:
        while chunk := source.read(_UPLOAD_CHUNK):
            out.write(chunk)


async def _spool(request: Request, incoming: FsPath) -> FsPath:
    """Write the request body to a file under ``incoming`` as it arrives (never joined in memory)."""
    target = incoming / f"{uuid.uuid4().hex}-body.json"
    try:
        with open(target, "xb") as out:
            async for chunk in request.stream():
                out.write(chunk)
    except OSError as exc:  # a full or read-only store: a storage problem (507), never a 500
        _discard(target)
        raise _not_staged("the request body", exc) from None
    except BaseException:  # the body limit, a client that went away
        _discard(target)
        raise
    return target


def _not_staged(what: str, exc: OSError) -> StorageFailure:
    """A full or read-only store while staging ``what``: a storage problem (507), never a 500."""
    return StorageFailure(
        f"{what} could not be staged in the store folder (TIKHON_STORE) ({exc.strerror or type(exc).__name__}); "
        "nothing was stored and no job was created. Check that the store folder is writable and has free space, "
        "then submit again.")


def _discard(path: FsPath) -> None:
    """Remove a partly written upload; a clean-up that fails (a read-only store) never hides the cause."""
    with contextlib.suppress(OSError):
        path.unlink(missing_ok=True)


class _Fields:
    """The request fields an intake process sent back (``intake_process.read_json_body``)."""

    def __init__(self, spec: dict[str, Any] | None, promote: str, min_improvement: float,
                 continue_from: int | None = None, old_weight: float | None = None):
        self.spec, self.promote, self.min_improvement = spec, promote, min_improvement
        self.continue_from, self.old_weight = continue_from, old_weight


def _form_number(form, field: str, kind: type, rule: str) -> Any:
    """A numeric multipart field, or None when absent; refused naming the field and what it takes."""
    if form.get(field) is None:
        return None
    try:
        return kind(str(form[field]))
    except ValueError:
        raise InvalidData(f"{field} must be {rule}, got {form[field]!r}.",
                          errors=[{"field": field, "value": str(form[field]), "message": f"expected {rule}"}]) from None


def _live_spec_or_none(store, name: str) -> dict[str, Any] | None:
    """The live version's spec, for an intake process to read a body that may carry none (the route asks again,
    in its order, when the body indeed has no spec)."""
    try:
        return intake.live_spec(store, name)
    except TikhonError:
        return None


async def _read_submission(request: Request, incoming: FsPath, name: str
                           ) -> tuple[Any, dict[str, Any], tuple[FsPath, str | None] | None, dict[str, Any] | None]:
    """(parsed request, its data member, the uploaded file saved under ``incoming`` or None, what an
    intake process read or None). Large JSON bodies are parsed and validated off the event loop, the
    largest in an intake process; an upload is never held in memory whole."""
    mt = media_type(request)
    if mt == "multipart/form-data":
        try:
            form = await request.form(max_files=2, max_fields=8)  # the table, and the spec sent as a file
        except Exception as exc:  # python-multipart raises several types for broken bodies
            raise MalformedBody(f"the multipart body could not be read ({exc}); send fields 'file' and optionally "
                                "'spec', 'promote', 'min_improvement'.") from None
        unknown = sorted(set(form.keys()) - {"file", "spec", "promote", "min_improvement", "continue_from", "old_weight"})
        if unknown:
            raise InvalidData(f"unknown multipart field(s) {unknown}; the fields are file, spec, promote, min_improvement, "
                              "continue_from, old_weight.",
                              errors=[{"field": k, "message": "unknown field"} for k in unknown])
        upload = form.get("file")
        if upload is None or isinstance(upload, str):
            raise InvalidData("the multipart body needs a 'file' part holding a CSV or Parquet table.",
                              errors=[{"field": "file", "message": "missing"}])
        fields: dict[str, Any] = {"data": {"csv": ""}}
        if form.get("spec") is not None:  # as text (curl -F 'spec=<spec.json') or as a file (-F spec=@spec.json)
            spec_part = form["spec"]
            raw_spec = spec_part.encode() if isinstance(spec_part, str) else await spec_part.read()
            fields["spec"] = parse_json(raw_spec, "multipart field 'spec'")
        if form.get("promote") is not None:
            fields["promote"] = str(form["promote"])
        if form.get("min_improvement") is not None:
            try:
                fields["min_improvement"] = float(str(form["min_improvement"]))
            except ValueError:
                raise InvalidData(f"min_improvement must be a number >= 0, got {form['min_improvement']!r}.",
                                  errors=[{"field": "min_improvement", "value": str(form["min_improvement"]),
                                           "message": "expected a number >= 0"}]) from None
        for field, kind, rule in (("continue_from", int, "a version number (an integer >= 1)"),
                                  ("old_weight", float, "a number in (0, 1]")):
            value = _form_number(form, field, kind, rule)
            if value is not None:
                fields[field] = value
        parsed = parse_training_request(fields)
        target = incoming / f"{uuid.uuid4().hex}-upload"
        try:
            await to_thread.run_sync(_save_upload, upload.file, target)
        except OSError as exc:  # a full or read-only store: a storage problem (507), never a 500
            _discard(target)
            raise _not_staged("the uploaded file", exc) from None
        except BaseException:
            _discard(target)
            raise
        finally:
            await form.close()
        return parsed, {}, (target, getattr(upload, "filename", None)), None
    if mt in ("", "application/json") or mt.endswith("+json"):
        settings = request.app.state.settings
        declared = request.headers.get("content-length", "")
        if declared.isdigit() and int(declared) > settings.intake_process_bytes:
            # parsed, turned into columns, validated and staged in an intake process (the row objects
            # would hold this process's interpreter lock for seconds): the body goes to a file as it
            # arrives, and only a summary comes back
            live = await to_thread.run_sync(_live_spec_or_none, request.app.state.store, name)
            read = await request.app.state.intake.read_json(await _spool(request, incoming), settings, incoming, live)
            if read.get("error") is not None and not read["deferred"]:
                raise read["error"]
            return _Fields(**read["request"]), read["data"], None, read
        raw = await request.body()
        if len(raw) > settings.intake_process_bytes:  # a body sent without a length (chunked)
            live = await to_thread.run_sync(_live_spec_or_none, request.app.state.store, name)
            read = await request.app.state.intake.read_json(raw, settings, incoming, live)
            del raw
            if read.get("error") is not None and not read["deferred"]:
                raise read["error"]
            return _Fields(**read["request"]), read["data"], None, read
        if len(raw) > OFF_LOOP_BYTES:
            parsed, data = await to_thread.run_sync(parse_training_body, raw)
        else:
            parsed, data = parse_training_body(raw)
        return parsed, data, None, None
    raise UnsupportedMediaType(
        f"Content-Type {mt!r} is not read here; send application/json or multipart/form-data (file + spec)."
    )


@router.post("/models/{name}/trainings", summary="Submit a training job", status_code=202, openapi_extra=_SUBMIT_DOC,
             operation_id="submitTraining", responses=A.document(A.Job, "The job.", 202))
async def submit(request: Request, name: ModelName) -> Response:
    key = intake.check_idempotency_key(request.headers.get("idempotency-key"))
    app = request.app
    store, settings = app.state.store, app.state.settings
    parsed, data, upload, read = await _read_submission(request, FsPath(store.jobs.incoming_dir), name)

    submitter = _submitter(request)
    limits = {"queue_limit": settings.max_queued_jobs, "submitter_limit": settings.max_queued_jobs_per_key}

    continuing = intake.check_continuation(parsed)  # {"continue_from", "old_weight"} or None

    def accept() -> tuple[dict[str, Any], bool]:
        intake.check_spec_size(parsed.spec, settings)  # before any other work on the request
        if key is None:  # a full queue refuses before the data is read (checked again when the job is entered)
            store.jobs.check_capacity(submitter=submitter, **limits)
        parent = None
        if continuing is not None:  # the parent's spec, checked to be continuable before the rows are read
            parent = intake.continuation_parent(store, name, continuing["continue_from"])
            spec_raw = parent["spec"]
        else:
            spec_raw = parsed.spec if parsed.spec is not None else intake.live_spec(store, name)
        stream = intake.stream_source(data, spec_raw if parent is None else {}, settings) if upload is None else None
        if stream is not None and continuing is not None:
            raise intake.continuation_streamed(settings)
        if stream is not None:  # out of core: the worker reads the source itself, in batches
            spec, counts, origin, files = intake.validate_stream(stream, spec_raw, settings, data["source"])
            job_request = {  # the worker reads exactly ``files`` (fixed here), each re-checked when opened
                "spec": spec, "promote": parsed.promote, "min_improvement": parsed.min_improvement,
                "data": origin, "grid": counts, "spec_reused": parsed.spec is None, "files": files,
                SUBMITTER: submitter,
            }
            return store.jobs.submit(name, job_request, idempotency_key=key, **limits)
        if read is not None and read.get("unread"):  # no live spec when the body arrived; one now (a race)
            raise Busy("the model's live version changed while this training body was read; nothing was stored "
                       "and no job was created. Submit it again.", retry_after=1)
        if read is not None and ("staged" in read or read.get("error") is not None):
            # read and staged by an intake process; its data errors are raised here, in their order
            if read.get("error") is not None:
                raise read["error"]
            path, origin, spec, counts = FsPath(read["staged"]), read["origin"], read["spec"], read["counts"]
            if parent is not None:  # a continuation: its new rows are checked against the parent version here
                try:
                    spec, counts = intake.validate_new_rows(tables.read_staged(path), parent, settings)
                except BaseException:
                    intake.discard(path)
                    raise
            elif read.get("checked_with", spec_raw) != spec_raw:  # the live spec changed since: check again there
                try:
                    spec, counts = app.state.intake.validate_staged(path, spec_raw, settings)
                except BaseException:
                    intake.discard(path)
                    raise
        else:
            # a continuation's new rows are read here, within the limits (the worker's whole-file read is for full trainings)
            big = _worker_reads(data, upload, settings) if parent is None else None
            if big is not None:  # larger than a few blocks: looked at here, read whole by the worker
                raw, where, origin, files, path = big
                spec, counts, seen, reading = intake.check_file(raw, spec_raw, settings, where)
                job_request = {
                    "spec": spec, "promote": parsed.promote, "min_improvement": parsed.min_improvement,
                    "data": origin | seen, "grid": counts, "spec_reused": parsed.spec is None, "read": reading,
                    **({"files": files} if files else {}), SUBMITTER: submitter,
                }
                return store.jobs.submit(name, job_request, data_path=path, idempotency_key=key, **limits)
            cols, origin = intake.load_data(data, settings, upload=upload, spec=intake.parse(spec_raw))
            if isinstance(data, dict):
                data.pop("rows", None)  # the row objects are columns now: free them before validating and staging
            if parent is not None:
                spec, counts = intake.validate_new_rows(cols, parent, settings)
            else:
                spec, counts = intake.validate(cols, spec_raw, settings)
            path = intake.stage(store, cols)
        job_request = {
            "spec": spec, "promote": parsed.promote, "min_improvement": parsed.min_improvement,
            "data": origin, "grid": counts, "spec_reused": parsed.spec is None and parent is None, SUBMITTER: submitter,
        }
        if continuing is not None:
            job_request.update(continuing)
        try:
            job, created = store.jobs.submit(name, job_request, data_path=str(path), idempotency_key=key, **limits)
        except BaseException:
            intake.discard(path)  # never raises: the submission's own error is the answer
            raise
        if not created:
            intake.discard(path)
        return job, created

    try:
        job, created = await to_thread.run_sync(accept)
    except BaseException:
        if read is not None and read.get("staged"):
            intake.discard(FsPath(read["staged"]))  # refused after the intake process staged it
        raise
    finally:
        if upload is not None:
            upload[0].unlink(missing_ok=True)
    view = job_view(job)
    headers = {"Location": view["links"]["self"]}
    if not created:
        headers[REPLAYED] = "true"
    return A.reply(A.Job, view, status=202, headers=headers)


def _worker_reads(data: Any, upload: tuple[FsPath, str | None] | None, settings: Any):
    """(opener, where, the job's ``data``, the fixed file list or None, the upload to stage or None) when the
    training file is too large to be read whole in the API process (``intake.read_at_submission``): an upload
    (staged as sent, in the job's folder) or an in-memory ``source`` file (fixed as a ``FileRef``). None for
    JSON rows, CSV text and small files, which are read here."""
    if upload is not None:
        path, filename = upload
        if intake.read_at_submission(path):
            return None
        return (lambda: open(path, "rb")), "the uploaded file", {"kind": "upload", "filename": filename}, None, str(path)
    if not isinstance(data, dict) or "source" not in data:
        return None
    path, where, ref = intake.source_file(data, settings)
    if intake.read_at_submission(path):
        return None
    return ref.open, where, {"kind": "source", "source": data["source"]}, [ref.to_json()], None


def _submitter(request: Request) -> str:
    """Whom the per-key queue limit counts: the key id when keys are in use, else the client address."""
    key = request.scope.get("state", {}).get("key_id")
    if key:
        return f"key:{key}"
    return f"client:{request.client.host if request.client else 'unknown'}"


@router.get("/trainings/{job_id}", summary="State, progress and outcome of a training job", operation_id="getTraining",
            responses=A.document(A.Job, "The job."), **auth.READ)
def get_job(request: Request, store: StoreDep, job_id: str = Path(..., max_length=64)) -> Response:
    return A.reply(A.Job, job_view(store.jobs.get(job_id)))


@router.get("/trainings", summary="Training jobs, newest first", operation_id="listTrainings",
            responses=A.document(A.JobList, "The jobs."), **auth.READ)
def list_jobs(request: Request, store: StoreDep, model: str | None = Query(None, description="Only jobs of this model.")) -> Response:
    if model is not None:
        validate_name(model)
    jobs = store.jobs.list(name=model)
    return A.reply(A.JobList, {"trainings": [job_view(j) for j in jobs]})


@router.delete("/trainings/{job_id}", summary="Cancel a queued or running job", operation_id="cancelTraining",
               responses=A.document(A.Job, "The job, cancelled (a running job stops within the grace period)."), **auth.TRAIN)
def cancel_job(request: Request, store: StoreDep, job_id: str = Path(..., max_length=64)) -> Response:
    return A.reply(A.Job, job_view(store.jobs.cancel(job_id)))
