"""Training jobs: submit (JSON or multipart), read, list, cancel. Training itself runs in a worker."""

from __future__ import annotations

import contextlib
import uuid
from pathlib import Path as FsPath
from typing import Any

from anyio import to_thread
from fastapi import APIRouter, Path, Query, Request
from fastapi.responses import Response

from service.api import auth, intake, problems
from service.api.problems import MalformedBody, UnsupportedMediaType
from service.api.render import json_response, media_type, parse_json
from service.api.schemas import TrainingRequest, parse_training_request, schema_ref
from service.errors import InvalidData, StorageFailure
from service.store.jobs import SUBMITTER
from service.store.names import validate_name

router = APIRouter(prefix="/v1", tags=["trainings"])

_MULTIPART_SCHEMA = {
    "type": "object",
    "required": ["file"],
    "properties": {
        "file": {"type": "string", "format": "binary", "description": "CSV or Parquet training table."},
        "spec": {"type": "string", "description": "The training spec as JSON text (omitted: reuse the live version's)."},
        "promote": {"type": "string", "enum": ["always", "if_better", "never"]},
        "min_improvement": {"type": "number", "minimum": 0},
    },
}

_SUBMIT_DOC = {
    **auth.TRAIN["openapi_extra"],
    "parameters": [{
        "name": "Idempotency-Key", "in": "header", "required": False, "schema": {"type": "string", "maxLength": 255},
        "description": "A repeated submission with the same key returns the first job instead of starting another.",
    }],
    "requestBody": {"required": True, "content": {
        "application/json": {"schema": schema_ref(TrainingRequest)},
        "multipart/form-data": {"schema": _MULTIPART_SCHEMA},
    }},
    "responses": {"202": {"description": "The job (new, or the first one with this Idempotency-Key).",
                          "headers": {"Location": {"schema": {"type": "string"}}}}},
}


def job_view(job: dict[str, Any]) -> dict[str, Any]:
    """The public shape of a job row from the catalog."""
    jid = job["id"]
    request = job.get("request") or {}
    out = {
        "id": jid,
        "model": job.get("name"),
        "state": job.get("state"),
        "progress": job.get("progress") or {"done": 0, "total": None},
        "attempts": job.get("attempts"),
        "created_at": job.get("created_at"),
        "started_at": job.get("started_at"),
        "heartbeat_at": job.get("heartbeat_at"),
        "finished_at": job.get("finished_at"),
        "version": job.get("version"),
        "promote": request.get("promote"),
        "min_improvement": request.get("min_improvement"),
        "data": request.get("data"),
        "grid": request.get("grid"),
        "decision": job.get("decision"),
        "problem": problems.stored_problem(job.get("problem")),
        "links": {"self": f"/v1/trainings/{jid}", "model": f"/v1/models/{job.get('name')}"},
    }
    if job.get("version") is not None:
        out["links"]["version"] = f"/v1/models/{job.get('name')}/versions/{job['version']}"
    return out


OFF_LOOP_BYTES = 65_536  # a JSON body larger than this is parsed and validated in a worker thread
_UPLOAD_CHUNK = 1 << 20


def _parse_training_json(raw: bytes) -> tuple[TrainingRequest, dict[str, Any]]:
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


def _discard(path: FsPath) -> None:
    """Remove a partly written upload; a clean-up that fails (a read-only store) never hides the cause."""
    with contextlib.suppress(OSError):
        path.unlink(missing_ok=True)


async def _read_submission(request: Request, incoming: FsPath
                           ) -> tuple[TrainingRequest | None, dict[str, Any], tuple[FsPath, str | None] | None]:
    """(parsed request, its data member, the uploaded file saved under ``incoming`` or None). Large
    JSON bodies are parsed and validated off the event loop; an upload is never held in memory whole."""
    mt = media_type(request)
    if mt == "multipart/form-data":
        try:
            form = await request.form(max_files=2, max_fields=8)  # the table, and the spec sent as a file
        except Exception as exc:  # python-multipart raises several types for broken bodies
            raise MalformedBody(f"the multipart body could not be read ({exc}); send fields 'file' and optionally "
                                "'spec', 'promote', 'min_improvement'.") from None
        unknown = sorted(set(form.keys()) - {"file", "spec", "promote", "min_improvement"})
        if unknown:
            raise InvalidData(f"unknown multipart field(s) {unknown}; the fields are file, spec, promote, min_improvement.",
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
                                  errors=[{"field": "min_improvement", "value": str(form["min_improvement"])}]) from None
        parsed = parse_training_request(fields)
        target = incoming / f"{uuid.uuid4().hex}-upload"
        try:
            await to_thread.run_sync(_save_upload, upload.file, target)
        except OSError as exc:  # a full or read-only store: a storage problem (507), never a 500
            _discard(target)
            raise StorageFailure(
                f"the uploaded file could not be staged in the store folder (TIKHON_STORE) "
                f"({exc.strerror or type(exc).__name__}); nothing was stored and no job was created. Check that "
                "the store folder is writable and has free space, then submit again.") from None
        except BaseException:
            _discard(target)
            raise
        finally:
            await form.close()
        return parsed, {}, (target, getattr(upload, "filename", None))
    if mt in ("", "application/json") or mt.endswith("+json"):
        raw = await request.body()
        if len(raw) > OFF_LOOP_BYTES:
            parsed, data = await to_thread.run_sync(_parse_training_json, raw)
        else:
            parsed, data = _parse_training_json(raw)
        return parsed, data, None
    raise UnsupportedMediaType(
        f"Content-Type {mt!r} is not read here; send application/json or multipart/form-data (file + spec)."
    )


@router.post("/models/{name}/trainings", summary="Submit a training job", status_code=202, openapi_extra=_SUBMIT_DOC)
async def submit(request: Request, name: str = Path(..., description="Model name.")) -> Response:
    validate_name(name)
    key = intake.check_idempotency_key(request.headers.get("idempotency-key"))
    app = request.app
    store, settings = app.state.store, app.state.settings
    parsed, data, upload = await _read_submission(request, FsPath(store.jobs.incoming_dir))

    submitter = _submitter(request)
    limits = {"queue_limit": settings.max_queued_jobs, "submitter_limit": settings.max_queued_jobs_per_key}

    def accept() -> tuple[dict[str, Any], bool]:
        intake.check_spec_size(parsed.spec, settings)  # before any other work on the request
        if key is None:  # a full queue refuses before the data is read (checked again when the job is entered)
            store.jobs.check_capacity(submitter=submitter, **limits)
        spec_raw = parsed.spec if parsed.spec is not None else intake.live_spec(store, name)
        stream = intake.stream_source(data, spec_raw, settings) if upload is None else None
        if stream is not None:  # out of core: the worker reads the source itself, in batches
            spec, counts, origin = intake.validate_stream(stream, spec_raw, settings, data["source"])
            job_request = {
                "spec": spec, "promote": parsed.promote, "min_improvement": parsed.min_improvement,
                "data": origin, "grid": counts, "spec_reused": parsed.spec is None, "stream": str(stream),
                SUBMITTER: submitter,
            }
            return store.jobs.submit(name, job_request, idempotency_key=key, **limits)
        cols, origin = intake.load_data(data, settings, upload=upload, spec=intake.parse(spec_raw))
        if isinstance(data, dict):
            data.pop("rows", None)  # the row objects are columns now: free them before validating and staging
        spec, counts = intake.validate(cols, spec_raw, settings)
        job_request = {
            "spec": spec, "promote": parsed.promote, "min_improvement": parsed.min_improvement,
            "data": origin, "grid": counts, "spec_reused": parsed.spec is None, SUBMITTER: submitter,
        }
        path = intake.stage(store, cols)
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
    finally:
        if upload is not None:
            upload[0].unlink(missing_ok=True)
    view = job_view(job)
    headers = {"Location": view["links"]["self"]}
    if not created:
        headers["Idempotent-Replay"] = "true"
    return json_response(view, status=202, headers=headers)


def _submitter(request: Request) -> str:
    """Whom the per-key queue limit counts: the key id when keys are in use, else the client address."""
    key = request.scope.get("state", {}).get("key_id")
    if key:
        return f"key:{key}"
    return f"client:{request.client.host if request.client else 'unknown'}"


@router.get("/trainings/{job_id}", summary="State, progress and outcome of a training job", **auth.READ)
def get_job(request: Request, job_id: str = Path(..., max_length=64)) -> Response:
    return json_response(job_view(request.app.state.store.jobs.get(job_id)))


@router.get("/trainings", summary="Training jobs, newest first", **auth.READ)
def list_jobs(request: Request, model: str | None = Query(None, description="Only jobs of this model.")) -> Response:
    if model is not None:
        validate_name(model)
    jobs = request.app.state.store.jobs.list(name=model)
    return json_response({"trainings": [job_view(j) for j in jobs]})


@router.delete("/trainings/{job_id}", summary="Cancel a queued or running job", **auth.TRAIN)
def cancel_job(request: Request, job_id: str = Path(..., max_length=64)) -> Response:
    return json_response(job_view(request.app.state.store.jobs.cancel(job_id)))
