"""Request and response shapes of the ``/v1`` routes, for validation and for the OpenAPI document.

The hot routes (predict, training submission) read their bodies with orjson and validate them here
(``TrainingRequest``) or by hand (predict rows), which keeps per-request overhead small; the models
below still describe every body in ``/openapi.json``.
"""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from service.errors import InvalidRequest, choice_message
from service.store.schema import VERSION_MAX

_FORBID = ConfigDict(extra="forbid")

Value = float | str


class RowsData(BaseModel):
    model_config = _FORBID
    rows: list[dict[str, Any]] = Field(
        ..., description="Rows as objects mapping column name to a finite number or a category label (string).",
        json_schema_extra={"items": {"type": "object", "additionalProperties": {"type": ["number", "string"]}}},
    )


class CsvData(BaseModel):
    model_config = _FORBID
    csv: str = Field(..., description="CSV text with one header line.")


class SourceData(BaseModel):
    model_config = _FORBID
    source: str = Field(
        ..., description="Path of a CSV or Parquet file relative to the server's data folder (TIKHON_DATA_DIR). "
        "Absolute paths, '..' and symbolic links that leave the folder are refused."
    )


class TrainingRequest(BaseModel):
    model_config = _FORBID
    data: RowsData | CsvData | SourceData = Field(..., description="Exactly one of rows, csv or source.")
    spec: dict[str, Any] | None = Field(
        None, description="The training spec (target, features, bases, penalty, cv, selection). Omitted: the spec "
        "of the model's live version is reused, so a scheduled retrain is one call."
    )
    promote: Literal["always", "if_better", "never"] = Field(
        "if_better", description="Whether the new version goes live: always; only if its CV error beats the live "
        "version's error on the new data by at least min_improvement; or never."
    )
    min_improvement: float = Field(
        0.0, ge=0, allow_inf_nan=False,
        description="For if_better: the least improvement of the selection metric (in its own units) the new "
        "version must show over the live one.",
    )

    @model_validator(mode="before")
    @classmethod
    def _one_data_kind(cls, value: Any) -> Any:
        if isinstance(value, dict) and isinstance(value.get("data"), dict):
            kinds = [k for k in ("rows", "csv", "source") if k in value["data"]]
            if len(kinds) != 1:
                raise ValueError(
                    "data must hold exactly one of 'rows', 'csv' or 'source'"
                    + (f", got {kinds}" if kinds else f", got keys {sorted(value['data'])}")
                )
        return value


def parse_training_request(raw: Any) -> TrainingRequest:
    """Validate the JSON body of a training submission; field errors become one ``InvalidData``."""
    try:
        return TrainingRequest.model_validate(raw)
    except ValidationError as exc:
        items = []
        for e in exc.errors(include_url=False):
            loc = [str(p) for p in e["loc"] if p not in ("RowsData", "CsvData", "SourceData")]
            loc = [p for p in loc if not p.startswith(("function-", "union["))]
            item = {"field": ".".join(loc) or "body", "message": e["msg"].removeprefix("Value error, ")}
            if e.get("type") == "literal_error":
                item["message"] = choice_message(e.get("input"), (e.get("ctx") or {}).get("expected", ""))
            if e.get("type") != "missing":
                item["value"] = e.get("input")
            items.append(item)
        # A union reports every alternative; keep the distinct messages.
        seen, unique = set(), []
        for it in items:
            key = (it["field"], it["message"])
            if key not in seen:
                seen.add(key)
                unique.append(it)
        first = unique[0]
        raise InvalidRequest(
            f"training request field '{first['field']}': {first['message']}"
            + (f" (and {len(unique) - 1} more, listed in 'errors')" if len(unique) > 1 else "")
            + "; see the TrainingRequest schema in /openapi.json.",
            errors=unique,
        ) from None


class PredictRequest(BaseModel):
    model_config = _FORBID
    rows: list[dict[str, Value]] = Field(..., description="Input rows: every input column of the model, nothing else.")
    interval: float | None = Field(
        None, gt=0, lt=1, description="Level of the CV+ prediction interval, e.g. 0.9. Omitted: no interval."
    )
    unseen_levels: Literal["warn", "refuse"] = Field(
        "warn", description="A category level not seen in training: 'warn' answers the row with the level's effect "
        "taken as zero and a warning listing the known levels; 'refuse' answers 422 naming the row and the known levels."
    )


class PredictedRow(BaseModel):
    value: float | None = Field(
        ..., description="The prediction; null when it is not a finite number (an input so far outside the "
        "training data that the basis overflowed), and a warning then says so."
    )
    interval: list[float | None] | None = Field(
        None, description="[lower, upper] at the requested level; a bound is null when the training set is too "
        "small for that level (CV+ needs about 1/(1-level) rows)."
    )
    warnings: list[str] = Field(default_factory=list, description="Extrapolation warnings (range, leverage, unseen category).")


class ModelBlock(BaseModel):
    name: str
    version: int
    created_at: str
    basis: dict[str, Any]
    penalty: dict[str, Any]
    cv: dict[str, Any]


class PredictResponse(BaseModel):
    model: ModelBlock
    predictions: list[PredictedRow]


class LiveRequest(BaseModel):
    model_config = _FORBID
    version: int = Field(..., ge=1, le=VERSION_MAX)
    reason: str = Field(..., min_length=1, max_length=1000, description="Why the live version changes (kept in the history).")


DOCUMENTED: tuple[type[BaseModel], ...] = (TrainingRequest, PredictRequest, PredictResponse, LiveRequest)


def schema_ref(model: type[BaseModel]) -> dict[str, Any]:
    """A reference to ``model`` in the OpenAPI components (the app factory registers ``DOCUMENTED``)."""
    if model not in DOCUMENTED:
        raise ValueError(f"{model.__name__} is not in schemas.DOCUMENTED")
    return {"$ref": f"#/components/schemas/{model.__name__}"}


def component_schemas() -> dict[str, Any]:
    out: dict[str, Any] = {}
    for model in DOCUMENTED:
        schema = model.model_json_schema(ref_template="#/components/schemas/{model}")
        out.update(schema.pop("$defs", {}))
        out[model.__name__] = schema
    return out
