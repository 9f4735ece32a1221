"""Model and version metadata, the CV table and regularization path, the live version and its history."""

from __future__ import annotations

import io
from typing import Any, Literal

import joblib

from fastapi import APIRouter, Path, Query, Request
from fastapi.responses import Response

from service.api import answers as A, auth, monitor
from service.api.render import read_json
from service.api.dependencies import ModelName, StoreDep
from service.api.schemas import LiveRequest, schema_ref
from service.engine.export import export_json, sklearn_pipeline
from service.errors import Conflict, IntegrityFailure, InvalidData
from service.store.schema import VERSION_MAX

router = APIRouter(prefix="/v1", tags=["models"])

VersionPath = Path(..., ge=1, le=VERSION_MAX, description="Version number (1, 2, ...).")

# Large parts of the manifest have their own routes; the metadata route links to them instead.
_SEPARATE = {"cv_table": "cv", "path": "path"}


def _engine_body(manifest: dict[str, Any]) -> dict[str, Any]:
    body = manifest.get("training")
    return body if isinstance(body, dict) else manifest


def version_metadata(name: str, version: int, manifest: dict[str, Any], row: dict[str, Any] | None = None) -> dict[str, Any]:
    body = _engine_body(manifest)
    meta = {k: v for k, v in body.items() if k not in _SEPARATE}
    out: dict[str, Any] = {
        "name": name,
        "version": version,
        "created_at": manifest.get("created_at"),
        "job_id": manifest.get("job_id"),
        "libraries": manifest.get("libraries"),
        "checksums": {"arrays_sha256": (manifest.get("arrays") or {}).get("sha256"),
                      "manifest_sha256": (row or {}).get("checksum")},
        **meta,
        "links": {
            "cv": f"/v1/models/{name}/versions/{version}/cv",
            "path": f"/v1/models/{name}/versions/{version}/path",
            "predictions": f"/v1/models/{name}/versions/{version}/predictions",
        },
    }
    return out


@router.get("/models", summary="List models with their live version", operation_id="listModels",
            responses=A.document(A.ModelList, "Every model with its live and newest version."), **auth.READ)
def list_models(request: Request, store: StoreDep) -> Response:
    return A.reply(A.ModelList, {"models": store.list_models()})


@router.get("/models/{name}", summary="One model: live version, versions, newest jobs", operation_id="getModel",
            responses=A.document(A.ModelDetail, "The model, its versions and its live version's metadata."), **auth.READ)
def get_model(request: Request, store: StoreDep, name: ModelName) -> Response:
    out = dict(store.get_model(name))
    versions = store.list_versions(name)
    live = out.get("live_version")
    out["versions"] = [v.get("version") for v in versions]
    out["monitoring_warnings"] = []
    if live is not None:
        manifest = store.get_manifest(name, live, cv_table=False)
        out["live_metadata"] = version_metadata(name, live, manifest)
        out["monitoring_warnings"] = monitor.live_warnings(request.app.state.monitor, name, live, manifest)
    out["links"] = {
        "versions": f"/v1/models/{name}/versions", "history": f"/v1/models/{name}/history",
        "trainings": f"/v1/trainings?model={name}", "predictions": f"/v1/models/{name}/predictions",
        "inputs": f"/v1/models/{name}/inputs", "outcomes": f"/v1/models/{name}/outcomes",
    }
    return A.reply(A.ModelDetail, out)


@router.get("/models/{name}/versions", summary="The versions of a model, oldest first", operation_id="listVersions",
            responses=A.document(A.VersionList, "The versions that exist (deleted ones are left out)."), **auth.READ)
def list_versions(request: Request, store: StoreDep, name: ModelName) -> Response:
    versions = store.list_versions(name)
    return A.reply(A.VersionList, {"name": name, "live_version": store.live_version(name), "versions": versions})


@router.get("/models/{name}/versions/{version}", summary="Full metadata of one version", operation_id="getVersion",
            responses=A.document(A.VersionMetadata, "The version's manifest less its CV table and path."), **auth.READ)
def get_version(request: Request, store: StoreDep, name: ModelName, version: int = VersionPath) -> Response:
    manifest = store.get_manifest(name, version, cv_table=False)
    row = store.get_version(name, version)
    out = version_metadata(name, version, manifest, row)
    out["live"] = bool(row.get("live"))
    return A.reply(A.VersionMetadata, out)


CV_PAGE_MAX = 10_000


@router.get("/models/{name}/versions/{version}/cv", summary="The CV table: best row per basis setting, or pages of all rows",
            operation_id="getCvTable", responses=A.document(A.CvTable, "Rows of the CV table and the chosen point."),
            **auth.READ)
def get_cv(request: Request, store: StoreDep, name: ModelName, version: int = VersionPath,
           view: A.CvView = Query(
               A.CvView.best_per_basis,
               description="best_per_basis: the best row of each basis setting (over strengths "
               "and l1 ratios); all: every row, in pages of `limit` from `offset`."),
           offset: int = Query(0, ge=0, description="First row of the page (view=all)."),
           limit: int = Query(1_000, ge=1, le=CV_PAGE_MAX, description="Rows per page (view=all).")) -> Response:
    import numpy as np

    from service.store import artifact

    manifest = store.get_manifest(name, version, cv_table=False)
    body = _engine_body(manifest)
    columns, meta = store.cv_columns(name, version, manifest)
    total = int(meta["rows"])
    out: dict[str, Any] = {
        "name": name, "version": version, "selection": (body.get("spec") or {}).get("selection"),
        "chosen": body.get("chosen"), "summary": body.get("cv_summary"), "view": view, "total": total,
    }
    base = f"/v1/models/{name}/versions/{version}/cv"
    if view == "best_per_basis":
        metric = ((body.get("spec") or {}).get("selection") or {}).get("metric") or (body.get("chosen") or {}).get("metric")
        mean = columns["mean"] if "mean" in columns else np.zeros(total)
        score = np.where(np.isfinite(mean), -mean if metric == "r2" else mean, np.inf)
        picks = []
        for b in range(len(meta["bases"])):
            rows = np.flatnonzero(columns["basis"] == b)
            if rows.size:
                picks.append(int(rows[np.argmin(score[rows])]))  # first of equal scores: the smallest strength
        out["table"] = [{"row": i, **r} for i, r in zip(picks, artifact.cv_rows(columns, meta, np.array(picks, dtype=np.int64)))]
        out["links"] = {"all": f"{base}?view=all&offset=0&limit=1000"}
    else:
        stop = min(total, offset + limit)
        out["offset"], out["limit"] = offset, limit
        out["table"] = artifact.cv_rows(columns, meta, slice(offset, stop)) if offset < total else []
        out["links"] = {"next": f"{base}?view=all&offset={stop}&limit={limit}" if stop < total else None}
    return A.reply(A.CvTable, out)


@router.get("/models/{name}/versions/{version}/path", summary="Regularization path of the chosen basis setting",
            operation_id="getPath", responses=A.document(A.PathAnswer, "Coefficients against penalty strength."), **auth.READ)
def get_path(request: Request, store: StoreDep, name: ModelName, version: int = VersionPath) -> Response:
    manifest = store.get_manifest(name, version, cv_table=False)
    body = _engine_body(manifest)
    return A.reply(A.PathAnswer, {"name": name, "version": version, "chosen": body.get("chosen"),
                          "path": resolve_arrays(store, name, version, manifest, body.get("path"))})


@router.get("/models/{name}/versions/{version}/export",
            summary="The model in a form that leaves the service: JSON to evaluate anywhere, or a scikit-learn pipeline",
            operation_id="exportVersion",
            responses={200: {"description": "format=json: the export document; format=sklearn: a joblib file.",
                             "model": A.ExportDocument,
                             "content": {"application/octet-stream": {"schema": {"type": "string", "format": "binary"}}}}},
            **auth.READ)
def export_version(request: Request, store: StoreDep, name: ModelName, version: int = VersionPath,
                   format: Literal["json", "sklearn"] = Query(
                       "json", description="json: the model's formula as numbers (see the README's evaluator); "
                                           "sklearn: a joblib file of a scikit-learn Pipeline (loading it runs code: "
                                           "load only exports from your own server).")) -> Response:
    loaded = store.load(name, version)  # verified against the catalog's checksums
    if format == "json":
        body = export_json(loaded.model)
        body["source"] = {"model": name, "version": int(version), "manifest_sha256": loaded.checksum,
                          "created_at": loaded.created_at}
        return A.reply(A.ExportDocument, body, headers={
            "Content-Disposition": f'attachment; filename="{name}-v{int(version)}.json"'})
    buf = io.BytesIO()
    joblib.dump(sklearn_pipeline(loaded.model), buf)  # written here, never loaded by the service
    return Response(buf.getvalue(), media_type="application/octet-stream", headers={
        "Content-Disposition": f'attachment; filename="{name}-v{int(version)}.joblib"'})


@router.put(
    "/models/{name}/live", summary="Set the live version (recorded in the history)", operation_id="setLive",
    responses=A.document(A.LiveChange, "The change, or that the version was already live."),
    openapi_extra={**auth.ADMIN["openapi_extra"], "requestBody": {
        "required": True, "content": {"application/json": {"schema": schema_ref(LiveRequest)}}}},
)
async def set_live(request: Request, store: StoreDep, name: ModelName) -> Response:
    raw = await read_json(request)
    try:
        body = LiveRequest.model_validate(raw)
    except Exception as exc:
        raise _invalid_body(exc, "LiveRequest") from None
    from anyio import to_thread


    def change() -> Any:
        try:
            store.verify(name, body.version)  # a version that would answer 500 on every prediction never goes live
        except IntegrityFailure as err:
            live = store.live_version(name)
            stays = f"version {live} stays live" if live is not None else "the model stays without a live version"
            raise Conflict(
                f"version {body.version} of model {name!r} failed verification ({err}); {stays}. Make another "
                "version live, or delete this one and train again.",
                errors=[{"field": "version", "value": body.version, "message": "failed verification: " + str(err)}],
            ) from None
        return store.set_live(name, body.version, actor=_actor(request), reason=body.reason)

    result = await to_thread.run_sync(change)
    request.app.state.models.forget_live(name)
    already = not result.get("changed") and not result.get("superseded")
    out = {"name": name, "live_version": body.version, "change": result, "already_live": already}
    if already:
        out["detail"] = f"version {body.version} of {name!r} is already live; nothing changed and no history entry was added."
    return A.reply(A.LiveChange, out)


@router.get("/models/{name}/history", summary="Every change of the live version", operation_id="getHistory",
            responses=A.document(A.History, "Every decision about the live version, oldest first."), **auth.READ)
def get_history(request: Request, store: StoreDep, name: ModelName) -> Response:
    entries = [decision_view(h) for h in store.history(name)]
    return A.reply(A.History, {"name": name, "history": entries})


def decision_view(entry: dict[str, Any]) -> dict[str, Any]:
    """A history entry with its decision spelled out: ``version`` (the version the entry is about),
    ``went_live`` and ``decision`` ("went live" or "not made live"). Entries that kept the live version
    (a retrain refused by if_better, ``promote: never``, a promotion superseded by a later change) carry
    ``details.not_made_live``."""
    details = entry.get("details") if isinstance(entry.get("details"), dict) else {}
    not_live = details.get("not_made_live")
    went = not_live is None
    return {**entry, "version": entry.get("to_version") if went else not_live, "went_live": went,
            "decision": "went live" if went else "not made live"}


@router.delete("/models/{name}/versions/{version}", summary="Delete a version that is not live", operation_id="deleteVersion",
               status_code=204, responses={204: {"description": "Deleted."}}, **auth.ADMIN)
def delete_version(request: Request, store: StoreDep, name: ModelName, version: int = VersionPath) -> Response:
    store.delete_version(name, version)
    request.app.state.models.forget(name, version)
    return Response(status_code=204)


def resolve_arrays(store, name: str, version: int, manifest: dict[str, Any], part: Any) -> Any:
    """Replace the manifest's ``"arrays:<member>"`` references in ``part`` by the arrays' values.

    Adapter: the store's ``LoadedVersion`` keeps the rebuilt model but not the raw arrays, so this reads
    them with the store's own verified reader (checksum and declared dtypes checked) from the version's
    folder ``<store root>/<name>/<version>``."""
    from service.store import artifact

    def refs(x: Any) -> bool:
        if isinstance(x, str):
            return x.startswith("arrays:")
        if isinstance(x, dict):
            return any(refs(v) for v in x.values())
        if isinstance(x, list):
            return any(refs(v) for v in x)
        return False

    if not refs(part):
        return part
    arrays, _ = artifact.read_arrays(store.root / name / str(version), manifest, name=name, version=version)

    def fill(x: Any) -> Any:
        if isinstance(x, str) and x.startswith("arrays:"):
            member = arrays.get(x.removeprefix("arrays:"))
            return None if member is None else member.tolist()
        if isinstance(x, dict):
            return {k: fill(v) for k, v in x.items()}
        if isinstance(x, list):
            return [fill(v) for v in x]
        return x

    return fill(part)


def _actor(request: Request) -> str:
    """Who made a change: the key id when keys are in use (never the secret), else the client address."""
    key = request.scope.get("state", {}).get("key_id")
    if key:
        return f"key:{key}"
    client = request.client.host if request.client else "unknown"
    return f"client:{client}"


def _invalid_body(exc: Exception, schema: str) -> InvalidData:
    from pydantic import ValidationError

    if isinstance(exc, ValidationError):
        items = [{"field": ".".join(str(p) for p in e["loc"]) or "body", "message": e["msg"],
                  **({"value": e.get("input")} if e.get("type") != "missing" else {})} for e in exc.errors(include_url=False)]
        first = items[0]
        return InvalidData(f"field '{first['field']}': {first['message']}; see the {schema} schema in /openapi.json.",
                           errors=items)
    return InvalidData(f"the body does not match the {schema} schema in /openapi.json.")
