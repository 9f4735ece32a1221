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
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from service.api import auth
from service.api.render import json_response, read_json
from service.errors import InvalidData
from service.api.dependencies import ModelName, StoreDep

router = APIRouter(prefix="/v1", tags=["admin"])

_FORBID = ConfigDict(extra="forbid")


class KeyRequest(BaseModel):
    model_config = _FORBID
    scopes: list[str] = Field(..., min_length=1, description="One or more of predict, train, admin, metrics.")
    label: str = Field("", max_length=200, description="A note saying who or what uses the key.")


class PruneRequest(BaseModel):
    model_config = _FORBID
    keep: int = Field(..., ge=0, description="How many of the newest versions to keep besides the live one.")
    dry_run: bool = Field(False, description="Only say which versions would be deleted ('deleted' lists them); "
                          "delete nothing.")


def _body_doc(model: type[BaseModel]) -> dict[str, Any]:
    return {"requestBody": {"required": True, "content": {"application/json": {"schema": model.model_json_schema()}}}}


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


@router.get("/keys", summary="API keys (never their secrets)", **auth.ADMIN)
def list_keys(request: Request, store: StoreDep) -> Response:
    return json_response({"keys": store.keys.list()})


@router.post("/keys", summary="Create an API key; its secret is shown once", status_code=201,
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
    return json_response(out, status=201, headers={"Location": f"/v1/keys/{out['key_id']}"})


@router.delete("/keys/{key_id}", summary="Revoke an API key (idempotent); never the last admin key", **auth.ADMIN)
def revoke_key(request: Request, store: StoreDep, key_id: str = Path(..., max_length=64)) -> Response:
    entry = store.keys.revoke(key_id, keep_last_admin=True)
    request.app.state.gate.forget()
    return json_response(entry)


@router.post("/models/{name}/prune", summary="Delete all versions except the live one and the newest 'keep'",
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
    return json_response(out)
