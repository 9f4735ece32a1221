"""Request and response shapes of the ``/v1`` routes, for validation and for the OpenAPI document.

The hot routes (predict, training submission) read their bodies with orjson and validate them here
(``TrainingRequest``) or by hand (predict rows), which keeps per-request overhead small; the models
below still describe every body in ``/openapi.json``.
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from service.api.answers import BasisSetting, Metric, PenaltySetting, PlotFormat, Promote, Scope, UnseenLevels
from service.engine.spec import TuneSpec
from service.errors import InvalidRequest, choice_message
from service.store.schema import VERSION_MAX

_FORBID = ConfigDict(extra="forbid", use_enum_values=True)

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
    # Read as a plain object here (the engine validates it with the data, naming each field); documented as
    # the engine's TuneSpec, the model that validation uses.
    spec: dict[str, Any] | None = Field(
        None, description="The training spec (target, features, bases, penalty, cv, selection). Omitted: the spec "
        "of the model's live version is reused, so a scheduled retrain is one call."
    )
    promote: Promote = Field(
        Promote.if_better, description="Whether the new version goes live: always; only if its CV error beats the live "
        "version's error on the new data by at least min_improvement; or never."
    )
    min_improvement: float = Field(
        0.0, ge=0, allow_inf_nan=False,
        description="For if_better: the least improvement of the selection metric (in its own units) the new "
        "version must show over the live one.",
    )
    continue_from: int | None = Field(
        None, ge=1, description="Continued training: a version of the same model whose spec, basis and per-fold "
        "summaries are kept; `data` then holds only the NEW rows, merged into its summaries before the whole "
        "strength × basis sweep runs again. Leave `spec` out (the version's own is used).")
    old_weight: float | None = Field(
        None, gt=0, le=1, allow_inf_nan=False, description="With continue_from: multiplies the weight of every "
        "earlier row (default 1); 0.8 on every monthly continuation forgets old months exponentially.")

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


class TrainingUpload(BaseModel):
    """A training submission as multipart/form-data: the table as a file, the rest as text fields."""
    model_config = _FORBID
    file: bytes = Field(..., description="CSV or Parquet training table.", json_schema_extra={"format": "binary"})
    spec: str | None = Field(None, description="The training spec (TuneSpec) as JSON text, or as a second file. "
                             "Omitted: the spec of the model's live version is reused.")
    promote: Promote = Field(Promote.if_better, description="Whether the new version goes live.")
    min_improvement: float = Field(0.0, ge=0, description="For if_better: the least improvement of the selection "
                                   "metric the new version must show.")
    continue_from: int | None = Field(None, ge=1, description="Continued training from this version: the file holds "
                                      "only the new rows (see TrainingRequest).")
    old_weight: float | None = Field(None, gt=0, le=1, description="With continue_from: weight of every earlier row.")


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
            if e.get("type") in ("literal_error", "enum"):
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
    interval_level: float | None = Field(
        None, gt=0, lt=1, description="Level of the CV+ prediction interval, e.g. 0.9 (each answer row's 'interval' "
        "holds its bounds). Omitted: no interval."
    )
    unseen_levels: UnseenLevels = Field(
        UnseenLevels.warn, description="A category level not seen in training: 'warn' answers the row with the level's effect "
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


class ModelCv(BaseModel):
    metric: Metric
    mean: float | None = Field(..., description="Mean CV metric of the chosen point.")
    splits: int | None = Field(..., description="Splits of the cross-validation.")


class ModelBlock(BaseModel):
    """The version that answered."""
    name: str
    version: int
    created_at: str
    basis: BasisSetting
    penalty: PenaltySetting
    cv: ModelCv


class PredictResponse(BaseModel):
    model: ModelBlock
    predictions: list[PredictedRow]


class KeyRequest(BaseModel):
    model_config = _FORBID
    scopes: list[str] = Field(..., min_length=1, description="One or more of predict, train, admin, metrics.")  # documented as Scope items (_REFS)
    label: str = Field("", max_length=200, description="A note saying who or what uses the key.")


class PruneRequest(BaseModel):
    model_config = _FORBID
    keep: int = Field(..., ge=0, description="How many of the newest versions to keep besides the live one.")
    dry_run: bool = Field(False, description="Only say which versions would be deleted ('deleted' lists them); "
                          "delete nothing.")


class LiveRequest(BaseModel):
    model_config = _FORBID
    version: int = Field(..., ge=1, le=VERSION_MAX)
    reason: str = Field(..., min_length=1, max_length=1000, description="Why the live version changes (kept in the history).")


DOCUMENTED: tuple[type[BaseModel], ...] = (TuneSpec, TrainingRequest, TrainingUpload, PredictRequest, PredictResponse, LiveRequest, KeyRequest,
                                           PruneRequest)


def schema_ref(model: type[BaseModel]) -> dict[str, Any]:
    """A reference to ``model`` in the OpenAPI components (the app factory registers ``DOCUMENTED``)."""
    if model not in DOCUMENTED:
        raise ValueError(f"{model.__name__} is not in schemas.DOCUMENTED")
    return {"$ref": f"#/components/schemas/{model.__name__}"}


# Members read loosely at run time (so their errors keep their own messages) but documented by a named
# schema: TrainingRequest.spec is checked by the engine together with the data (TuneSpec), KeyRequest.scopes
# by the key store (Scope).
_REFS = {
    ("TrainingRequest", "spec"): {"anyOf": [{"$ref": "#/components/schemas/TuneSpec"}, {"type": "null"}]},
    ("KeyRequest", "scopes"): {"type": "array", "minItems": 1, "items": {"$ref": "#/components/schemas/Scope"}},
}


# Closed sets that parameters refer to by name (routes read them as text, with their own messages).
ENUMS = (PlotFormat, Scope, UnseenLevels)


def component_schemas() -> dict[str, Any]:
    from pydantic import TypeAdapter

    out: dict[str, Any] = {e.__name__: TypeAdapter(e).json_schema() for e in ENUMS}
    for model in DOCUMENTED:
        schema = model.model_json_schema(ref_template="#/components/schemas/{model}")
        out.update(schema.pop("$defs", {}))
        out[model.__name__] = schema
    for (name, member), ref in _REFS.items():
        prop = out[name]["properties"][member]
        out[name]["properties"][member] = {**ref, **{k: prop[k] for k in ("description", "default") if k in prop}}
    return out
