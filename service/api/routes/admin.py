"""Operator routes (admin scope): API keys and pruning old versions.

* ``POST /v1/keys`` makes a key with one or more scopes; the answer is the only place its secret ever
  appears (the catalog keeps a SHA-256 of it). ``GET /v1/keys`` lists keys without secrets,
  ``DELETE /v1/keys/{key_id}`` revokes one (idempotent), except the last active admin key (409: revoke
  that one with ``tikhon keys revoke --local`` on the server's machine).
* ``POST /v1/models/{name}/prune`` deletes every version of a model except the live one and the newest
  ``keep``; deleted numbers are never handed out again.

Bootstrap: while no active key exists, every route is open and the server listens on loopback only,
so the first key is made over loopback (``tikhon keys create --scope admin``). The key gate's cache
is cleared after each change so the change holds at once in this process.
"""

from __future__ import annotations

from typing import Any

from anyio import to_thread
from fastapi import APIRouter, Path, Request
from fastapi.responses import Response
from pydantic import BaseModel, ValidationError

from service.api import answers as A, auth
from service.api.render import read_json
from service.errors import InvalidData
from service.api.dependencies import ModelName, StoreDep
from service.api.schemas import KeyRequest, PruneRequest, schema_ref

router = APIRouter(prefix="/v1", tags=["admin"])

def _body_doc(model: type[BaseModel]) -> dict[str, Any]:
    return {"requestBody": {"required": True, "content": {"application/json": {"schema": schema_ref(model)}}}}


def _parse(model: type[BaseModel], raw: Any) -> Any:
    try:
        return model.model_validate(raw)
    except ValidationError as exc:
        items = [{"field": ".".join(str(p) for p in e["loc"]) or "body", "message": e["msg"],
                  **({"value": e.get("input")} if e.get("type") != "missing" else {})}
                 for e in exc.errors(include_url=False)]
        first = items[0]
        raise InvalidData(f"field '{first['field']}': {first['message']}; see the {model.__name__} schema in "
                          "/openapi.json.", errors=items) from None


@router.get("/keys", summary="API keys (never their secrets)", operation_id="listKeys",
            responses=A.document(A.ApiKeyList, "Every key, active or revoked."), **auth.ADMIN)
def list_keys(request: Request, store: StoreDep) -> Response:
    return A.reply(A.ApiKeyList, {"keys": store.keys.list()})


@router.post("/keys", summary="Create an API key; its secret is shown once", status_code=201, operation_id="createKey",
             responses=A.document(A.NewApiKey, "The new key with its secret.", 201),
             openapi_extra={**auth.ADMIN["openapi_extra"], **_body_doc(KeyRequest)})
async def create_key(request: Request, store: StoreDep) -> Response:
    body = _parse(KeyRequest, await read_json(request))

    def make() -> dict[str, Any]:
        key_id, secret = store.keys.create(body.scopes, body.label)
        entry = next(k for k in store.keys.list() if k["key_id"] == key_id)
        return {**entry, "secret": secret}

    out = await to_thread.run_sync(make)
    request.app.state.gate.forget()
    out["note"] = "The secret is shown only in this answer; store it now. Send it as 'Authorization: Bearer <secret>'."
    return A.reply(A.NewApiKey, out, status=201, headers={"Location": f"/v1/keys/{out['key_id']}"})


@router.delete("/keys/{key_id}", summary="Revoke an API key (idempotent); never the last admin key", operation_id="revokeKey",
               responses=A.document(A.ApiKey, "The key, revoked."), **auth.ADMIN)
def revoke_key(request: Request, store: StoreDep, key_id: str = Path(..., max_length=64)) -> Response:
    entry = store.keys.revoke(key_id, keep_last_admin=True)
    request.app.state.gate.forget()
    return A.reply(A.ApiKey, entry)


@router.post("/models/{name}/prune", summary="Delete all versions except the live one and the newest 'keep'",
             operation_id="pruneVersions", responses=A.document(A.PruneResult, "What was (or would be) deleted."),
             openapi_extra={**auth.ADMIN["openapi_extra"], **_body_doc(PruneRequest)})
async def prune(request: Request, store: StoreDep, name: ModelName) -> Response:
    body = _parse(PruneRequest, await read_json(request))

    def run() -> dict[str, Any]:
        deleted = store.prune_plan(name, body.keep) if body.dry_run else store.prune(name, body.keep)
        remaining = [v["version"] for v in store.list_versions(name) if v["version"] not in set(deleted)]
        return {"name": name, "keep": body.keep, "dry_run": body.dry_run, "deleted": deleted,
                "live_version": store.live_version(name), "remaining": remaining}

    out = await to_thread.run_sync(run)
    for v in out["deleted"]:
        request.app.state.models.forget(name, v)
    return A.reply(A.PruneResult, out)
