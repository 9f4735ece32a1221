"""The OpenAPI document of a live server as a typed contract (what a generated client relies on).

One server is toured (``tests/apitour.py``: train from rows and from an upload, a failed and a cancelled
job, every read route, the figures as SVG, PNG and JSON, predictions as JSON and CSV, live changes, prune,
keys, problems), and ``/openapi.json`` is read while the server is open and again once a key exists.

* every 2xx JSON answer of every operation declares a non-empty schema, and every recorded answer
  validates against the schema the document declares for its operation, status and media type
  (JSON Schema 2020-12, the dialect of OpenAPI 3.1, checked with the ``jsonschema`` package);
* every operation has an explicit, readable operation id, and no id or schema name carries a path or
  method fragment (the framework's default ids look like ``get_job_v1_trainings_job_id_get``);
* every closed set of values is an enum holding exactly the values the server accepts;
* figures and CSV are binary strings, problem ``errors`` items declare their fields;
* security: the open server's document asks for no key, the keyed one's asks for the scheme.
"""

from __future__ import annotations

import re
from typing import Any

import httpx
import jsonschema
import pytest

METHODS = ("get", "put", "post", "delete", "patch")


def _operations(doc: dict[str, Any]):
    for path, item in doc["paths"].items():
        for method, op in item.items():
            if method in METHODS:
                yield path, method, op


def _schema(doc: dict[str, Any], schema: dict[str, Any]) -> dict[str, Any]:
    while "$ref" in schema:
        schema = doc["components"]["schemas"][schema["$ref"].rsplit("/", 1)[1]]
    return schema


def test_every_success_json_answer_has_a_schema(toured):
    _, doc, keyed, _, _ = toured
    checked = 0
    for d in (doc, keyed):
        for path, method, op in _operations(d):
            for status, response in op["responses"].items():
                if not status.startswith("2"):
                    continue
                for media, content in (response.get("content") or {}).items():
                    schema = content.get("schema")
                    assert schema, f"{method} {path} {status} {media}: no schema"
                    if media == "application/json":
                        resolved = _schema(d, schema)
                        assert resolved.get("properties") or resolved.get("additionalProperties") \
                            or resolved.get("anyOf"), f"{method} {path}: an empty JSON schema"
                        checked += 1
    assert checked >= 2 * 24


def test_real_answers_validate_against_the_document(toured):
    _, _, doc, answers, _ = toured
    ops = {(path, method): op for path, method, op in _operations(doc)}
    seen: set[tuple[str, str]] = set()
    validated = 0
    for a in answers:
        op = ops[(a.template, a.method)]
        seen.add((a.template, a.method))
        responses = op["responses"]
        response = responses.get(str(a.status)) or responses.get(f"{str(a.status)[0]}XX")
        assert response is not None, f"{a.method} {a.template}: status {a.status} is not documented"
        if a.status == 204:
            continue
        content = response.get("content") or {}
        assert a.media_type in content, f"{a.method} {a.template} {a.status}: {a.media_type} not documented"
        schema = content[a.media_type]["schema"]
        if a.media_type.endswith("json"):
            root = {**schema, "components": doc["components"]}
            jsonschema.Draft202012Validator(root).validate(a.body)  # raises naming the member that differs
            validated += 1
        else:  # figures, CSV, metrics, the problem page: strings (binary for figures and CSV)
            assert schema["type"] == "string"
            if a.media_type in ("image/png", "image/svg+xml", "text/csv"):
                assert schema.get("format") == "binary", (a.template, a.media_type)
    assert validated >= 45
    assert seen == set(ops), f"operations the tour missed: {sorted(set(ops) - seen)}"


def test_a_drifting_answer_would_fail_validation(toured):
    """The check above can fail: a job whose state is outside the closed set, or a model list entry with a
    text version, is refused by the document's schemas."""
    _, _, doc, answers, _ = toured
    job = next(a.body for a in answers if a.template == "/v1/trainings/{job_id}" and a.status == 200)
    job_schema = {"$ref": "#/components/schemas/Job", "components": doc["components"]}
    jsonschema.Draft202012Validator(job_schema).validate(job)
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.Draft202012Validator(job_schema).validate({**job, "state": "paused"})
    listing = next(a.body for a in answers if a.template == "/v1/models" and a.status == 200)
    bad = {"models": [{**listing["models"][0], "live_version": "one"}]}
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.Draft202012Validator({"$ref": "#/components/schemas/ModelList", "components": doc["components"]}
                                        ).validate(bad)


READABLE_ID = re.compile(r"^[a-z][a-zA-Z0-9]{2,40}$")
SCHEMA_NAME = re.compile(r"^[A-Z][a-zA-Z0-9]{1,40}$")


def _fragments(path: str) -> set[str]:
    """Pieces a framework would mangle into a name: the path's segments joined pairwise (``modelsName``,
    ``versionsVersion``), the ``v1`` prefix and the HTTP methods at the ends of a name."""
    parts = [p.strip("{}").replace("_", "") for p in path.strip("/").split("/") if p]
    pairs = {a.lower() + b.lower() for a, b in zip(parts, parts[1:])}
    return pairs | {"v1"}


def test_operation_ids_and_schema_names_are_our_own(toured):
    _, doc, keyed, _, _ = toured
    for d in (doc, keyed):
        ids = []
        for path, method, op in _operations(d):
            oid = op.get("operationId")
            assert oid and READABLE_ID.match(oid), (method, path, oid)
            low = oid.lower()
            for frag in _fragments(path):
                assert frag not in low, (oid, frag)
            for m in METHODS:
                assert not low.endswith(m), (oid, m)  # getModel is a verb; modelGet is a mangle
            ids.append(oid)
        assert len(ids) == len(set(ids)) >= 28
        names = d["components"]["schemas"]
        all_fragments = {f for path, _, _ in _operations(d) for f in _fragments(path)}
        for name in names:
            assert SCHEMA_NAME.match(name), name  # no Body_..., no -Input/-Output, no __
            low = name.lower()
            assert not low.startswith("body"), name
            assert not any(low.endswith(m) for m in METHODS), name
            assert not any(f in low for f in all_fragments), name
    # the ids the project's own names use (predictions keep theirs when their paths change)
    ops = {op["operationId"] for _, _, op in _operations(keyed)}
    assert {"predict", "predictVersion", "submitTraining", "getTraining", "listModels", "setLive", "getCvTable",
            "plotCv", "createKey"} <= ops


def _enum_at(doc: dict[str, Any], schema: dict[str, Any]) -> list[Any]:
    schema = _schema(doc, schema)
    if "items" in schema:
        return _enum_at(doc, schema["items"])
    if "anyOf" in schema:  # "X or null"
        found = [v for b in schema["anyOf"] if b.get("type") != "null" for v in _enum_at(doc, b)]
        return found
    return list(schema.get("enum", []))


def _prop(doc, name: str, member: str) -> dict[str, Any]:
    return doc["components"]["schemas"][name]["properties"][member]


def test_every_closed_set_is_an_enum_of_the_values_the_server_accepts(toured):
    from service.api import auth, levels
    from service.api.rendering import figures as plots
    from service.engine import spec as engine_spec

    _, _, doc, answers, _ = toured
    states = {a.body["state"] for a in answers if a.template.startswith("/v1/trainings") and a.status in (200, 202)
              and isinstance(a.body, dict) and "state" in a.body}
    job_states = _enum_at(doc, _prop(doc, "Job", "state"))
    # the five states of a job's life (README "Training jobs"; common practice for a job queue)
    assert job_states == ["queued", "running", "succeeded", "failed", "cancelled"]
    assert states <= set(job_states) and {"succeeded", "cancelled"} <= states

    def literal(model, member):
        return list(model.model_fields[member].annotation.__args__)

    expected = {
        ("TrainingRequest", "promote"): ["always", "if_better", "never"],
        ("TrainingUpload", "promote"): ["always", "if_better", "never"],
        ("Job", "promote"): ["always", "if_better", "never"],
        ("Penalty", "kind"): literal(engine_spec.Penalty, "kind"),
        ("CrossValidation", "scheme"): literal(engine_spec.CrossValidation, "scheme"),
        ("CrossValidation", "assignment"): literal(engine_spec.CrossValidation, "assignment"),
        ("Selection", "metric"): literal(engine_spec.Selection, "metric"),
        ("Selection", "rule"): literal(engine_spec.Selection, "rule"),
        ("Execution", "mode"): literal(engine_spec.Execution, "mode"),
        ("TuneSpec", "basis_fit"): literal(engine_spec.TuneSpec, "basis_fit"),
        ("KeyRequest", "scopes"): list(auth.SCOPES),
        ("ApiKey", "scopes"): list(auth.SCOPES),
        ("PredictRequest", "unseen_levels"): list(levels.MODES),
        ("CvSummary", "metric"): literal(engine_spec.Selection, "metric"),
        ("CvSummary", "scheme"): literal(engine_spec.CrossValidation, "scheme"),
        ("CvPoint", "rule"): literal(engine_spec.Selection, "rule"),
        ("PenaltySetting", "kind"): literal(engine_spec.Penalty, "kind"),
        ("BasisSetting", "kind"): ["linear", "polynomial", "rbf"],
    }
    for (name, member), values in expected.items():
        assert _enum_at(doc, _prop(doc, name, member)) == values, (name, member)
    assert ["l2", "l1", "elastic_net"] == expected[("Penalty", "kind")]
    # query parameters: the figure format and the CV view are named enums
    for path, method, op in _operations(doc):
        for param in op.get("parameters", []):
            if param["name"] == "format":
                assert _enum_at(doc, param["schema"]) == list(plots.FORMATS)
            if param["name"] == "view":
                assert _enum_at(doc, param["schema"]) == ["best_per_basis", "all"]
            if param["name"] == "unseen_levels":
                assert _enum_at(doc, param["schema"]) == list(levels.MODES)


def test_problem_errors_declare_their_fields(toured):
    _, _, doc, answers, _ = toured
    item = _schema(doc, _schema(doc, _prop(doc, "Problem", "errors"))["anyOf"][0]["items"])
    assert set(item["properties"]) == {"field", "value", "message"}
    assert set(item["required"]) == {"field", "message"}
    with_errors = [a.body for a in answers if a.media_type == "application/problem+json" and a.body.get("errors")]
    assert with_errors and all({"field", "message"} <= set(e) for b in with_errors for e in b["errors"])


def test_the_interval_level_parameter_is_the_csv_forms(toured):
    _, _, doc, _, _ = toured
    for path, method, op in _operations(doc):
        if op["operationId"] in ("predict", "predictVersion"):
            param = next(p for p in op["parameters"] if p["name"] == "interval_level")
            assert param["description"].startswith("CSV form only")
            request = _schema(doc, op["requestBody"]["content"]["application/json"]["schema"])["properties"]
            assert "interval_level" in request and "interval" not in request  # the level asked for
            answer = _schema(doc, op["responses"]["200"]["content"]["application/json"]["schema"])
            row = _schema(doc, _schema(doc, answer["properties"]["predictions"])["items"])["properties"]
            assert "interval" in row and "interval_level" not in row  # the bounds answered
            assert op["requestBody"]["content"]["text/csv"]["schema"]["format"] == "binary"


def test_security_is_optional_while_open_and_required_once_keys_exist(toured):
    base, open_doc, keyed, _, key = toured
    for path, method, op in _operations(open_doc):
        assert "security" not in op, (method, path)
    v1 = [(p, m, op) for p, m, op in _operations(keyed) if p.startswith("/v1/")]
    for path, method, op in v1:
        declared = [s for req in op["security"] for s in req["bearerKey"]]
        assert declared and declared == op["x-tikhon-scopes"], (method, path)
    scheme = keyed["components"]["securitySchemes"]["bearerKey"]
    assert scheme["scheme"] == "bearer" and "no key exists" in scheme["description"]
    # once keys exist an empty token is a 401 problem naming the fix, never a crash
    r = httpx.get(f"{base}/v1/models", headers={"Authorization": "Bearer"}, timeout=30)
    assert r.status_code == 401 and r.headers["content-type"] == "application/problem+json"
    assert "Authorization: Bearer <key>" in r.json()["detail"]
    r = httpx.get(f"{base}/v1/models", headers={"Authorization": f"Bearer {key}"}, timeout=30)
    assert r.status_code == 200


def test_the_projects_client_works_with_and_without_a_key(tmp_path):
    import livesvc
    from service.client import Client, ServiceError

    with livesvc.live_service(tmp_path, worker=False) as (base, store, _):
        for key in (None, ""):  # an empty key sends no header at all
            with Client(base, key=key) as tk:
                assert tk.models() == []
        _, secret = store.keys.create(["admin"], "contract")
        with Client(base, key=secret) as tk:
            assert tk.models() == []
        with Client(base, key="") as tk:
            with pytest.raises(ServiceError) as err:
                tk.models()
            assert err.value.status == 401
