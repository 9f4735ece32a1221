"""The README's training spec table against the spec's schema in the OpenAPI document.

The table is prose for people; the schema (``TuneSpec`` in ``/openapi.json``, from the pydantic model the
engine validates with) is what generated clients see. This test keeps the two the same: every member of
the schema has a row and every row names a member; a default written in the table is the schema's
default (and the model's own, for a spec with only a target); every value of a closed set (an enum) is
named in its row; bounds the schema declares (minimum and maximum) are written in the row.
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import pytest

from service.api.schemas import component_schemas
from service.engine.spec import TuneSpec

README = Path(__file__).resolve().parents[2] / "README.md"


def _table() -> list[tuple[list[str], str, str]]:
    lines = README.read_text(encoding="utf-8").splitlines()
    start = lines.index("| field | default | meaning |")
    rows = []
    for line in lines[start + 2:]:
        if not line.startswith("|"):
            break
        cells = [c.strip() for c in re.split(r"(?<!\\)\|", line.strip())[1:-1]]
        names = re.findall(r"`([^`]+)`", cells[0])
        first = names[0]
        # "`penalty.strengths.min`, `.max`, `.count`": the later names share the first one's parent
        parent = first.rsplit(".", 1)[0]
        fields = [first] + [parent + n if n.startswith(".") else n for n in names[1:]]
        rows.append((fields, cells[1], cells[2]))
    return rows


def _resolve(schema: dict[str, Any], defs: dict[str, Any]) -> dict[str, Any]:
    ref = schema.get("$ref")
    return _resolve(defs[ref.rsplit("/", 1)[1]], defs) if ref else schema


def _members(schema: dict[str, Any], defs: dict[str, Any], prefix: str = "") -> dict[str, dict[str, Any]]:
    """Dotted member name -> its schema (``[]`` for the items of a list), containers (nested objects) left
    out, their members kept."""
    out: dict[str, dict[str, Any]] = {}
    for name, prop in _resolve(schema, defs).get("properties", {}).items():
        path = f"{prefix}{name}"
        target = _resolve(prop, defs)
        branches = [_resolve(b, defs) for b in target.get("anyOf", target.get("oneOf", []))]
        items = target.get("items")
        if target.get("type") == "object" and "properties" in target:
            out.update(_members(target, defs, path + "."))  # a nested object is only a container
            continue
        out[path] = {**target, "required": name in _resolve(schema, defs).get("required", [])}
        for b in branches:
            if b.get("type") == "object" and "properties" in b:
                out.update(_members(b, defs, path + "."))
        if items:
            for b in [_resolve(x, defs) for x in _resolve(items, defs).get("oneOf", [items])]:
                for sub, s in _members(b, defs, path + "[].").items():
                    merged = out.setdefault(sub, s)
                    if merged is not s and "enum" in s:  # kind: one constant per basis
                        merged.setdefault("enum", []).extend(s["enum"])
                    if "const" in s:
                        out[sub].setdefault("enum", []).append(s["const"])
    return out


@pytest.fixture(scope="module")
def spec_schema() -> tuple[dict[str, Any], dict[str, Any]]:
    components = component_schemas()  # what /openapi.json carries under components.schemas
    assert components["TrainingRequest"]["properties"]["spec"]["anyOf"][0] == {"$ref": "#/components/schemas/TuneSpec"}
    defs = {k: v for k, v in components.items()}
    return components["TuneSpec"], defs


def test_every_spec_member_has_a_row_and_every_row_a_member(spec_schema):
    members = _members(*spec_schema)
    documented = {f for fields, _, _ in _table() for f in fields}
    assert set(members) - documented == set(), "spec members missing from the README table"
    assert documented - set(members) == set(), "README rows naming no spec member"
    assert {"target", "bases[].degrees", "penalty.strengths.count", "cv.scheme", "execution.batch_rows"} <= set(members)


def _cell_value(cell: str) -> Any:
    text = cell.strip()
    if re.fullmatch(r"`[^`]*`", text):
        text = text.strip("`")
        try:
            return json.loads(text)
        except ValueError:
            return text
    digits = text.replace(" ", "").replace("\u202f", "")
    if re.fullmatch(r"-?\d+(\.\d+)?", digits):
        return json.loads(digits)
    return None  # prose ("all numeric columns but the target", "row position"): not compared


def test_defaults_in_the_table_are_the_schemas_and_the_models(spec_schema):
    members = _members(*spec_schema)
    model_defaults = TuneSpec.model_validate({"target": "y"}).model_dump(mode="json")
    compared = 0
    for fields, default, _ in _table():
        for field in fields:
            schema = members[field]
            if default == "required":
                assert schema["required"], field
                continue
            value = _cell_value(default)
            if value is None:
                continue
            assert "default" in schema, f"{field}: the README gives a default the schema lacks"
            assert schema["default"] == value, (field, schema["default"], value)
            if "[]" not in field:
                node: Any = model_defaults
                for part in field.split("."):
                    node = node[part]
                assert node == value, (field, node, value)
            compared += 1
    assert compared >= 15


def test_every_enum_value_and_bound_is_written_in_its_row(spec_schema):
    members = _members(*spec_schema)
    enums = bounds = 0
    for fields, default, meaning in _table():
        text = (default + " " + meaning).replace(" ", "").replace("\u202f", "")
        for field in fields:
            schema = members[field]
            for value in schema.get("enum", []):
                assert f"`{value}`" in text, (field, value)
                enums += 1
            if "minimum" in schema and "maximum" in schema:
                lo, hi = schema["minimum"], schema["maximum"]
                assert f"{lo}–{hi}" in text or f"{lo}-{hi}" in text, (field, lo, hi, meaning)
                bounds += 1
    assert enums >= 20 and bounds >= 4
