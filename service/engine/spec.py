"""The training spec: its JSON shape, its defaults, and its validation.

The spec is validated once, here, and every failure becomes one ``InvalidSpec`` whose ``errors`` list
names each offending field (dotted path), the value received and the fix. Pydantic's own exception
type never leaves this module.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal, Union

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from service.errors import InvalidSpec, choice_message

_STRICT = ConfigDict(extra="forbid", frozen=True)


# Bounds of list items, for the JSON schema only: the validators below check them with messages that name
# the value and the fix, which pydantic's item constraints would pre-empt.
# (A default made by a factory is written into the schema here too; pydantic leaves it out.)
def _items(default: Any, **bounds: Any) -> dict[str, Any]:
    return {"items": bounds, "default": default}


def _list_branch(default: Any, **bounds: Any):
    def patch(schema: dict[str, Any]) -> None:
        if default is not None:
            schema["default"] = default
        for branch in schema.get("anyOf", []):
            if branch.get("type") == "array":
                branch["items"] = bounds
    return patch


class LinearBasis(BaseModel):
    """The inputs themselves (standardized), one term each."""
    model_config = _STRICT
    kind: Literal["linear"] = Field("linear", description="Basis kind: linear.")


class PolynomialBasis(BaseModel):
    """All products of the standardized inputs up to each degree tried."""
    model_config = _STRICT
    kind: Literal["polynomial"] = Field("polynomial", description="Basis kind: polynomial.")
    degrees: list[int] = Field(
        default_factory=lambda: [1, 2, 3], min_length=1, json_schema_extra=_items([1, 2, 3], type="integer", minimum=1),
        description="Degrees to try, each >= 1, no repeats; a degree includes all products of inputs up to it.")

    @field_validator("degrees")
    @classmethod
    def _degrees(cls, v: list[int]) -> list[int]:
        bad = [d for d in v if d < 1]
        if bad:
            raise ValueError(f"degrees must be >= 1, got {bad[0]}; use the linear basis or a degree of 1 or more")
        if len(set(v)) != len(v):
            raise ValueError(f"degrees must not repeat, got {v}")
        return sorted(v)


class RBFBasis(BaseModel):
    """Gaussian radial basis functions around centres chosen from the rows."""
    model_config = _STRICT
    kind: Literal["rbf"] = Field("rbf", description="Basis kind: rbf.")
    widths: list[float] = Field(
        default_factory=lambda: [0.5, 1.0, 2.0], min_length=1, json_schema_extra=_items([0.5, 1.0, 2.0], type="number", exclusiveMinimum=0),
        description="Gaussian widths to try, in units of standardized inputs; positive, finite, no repeats.")
    centers: int = Field(100, ge=1, le=20_000, description="Number of centres (1-20 000).")

    @field_validator("widths")
    @classmethod
    def _widths(cls, v: list[float]) -> list[float]:
        bad = [w for w in v if not (np.isfinite(w) and w > 0)]
        if bad:
            raise ValueError(f"widths must be positive and finite, got {bad[0]}; pass widths such as [0.5, 1, 2] "
                             "(in units of standardized inputs)")
        if len(set(v)) != len(v):
            raise ValueError(f"widths must not repeat, got {v}")
        return sorted(v)


Basis = Annotated[Union[LinearBasis, PolynomialBasis, RBFBasis], Field(discriminator="kind")]


class StrengthRange(BaseModel):
    """A log-spaced range of penalty strengths (as numpy.geomspace)."""
    model_config = _STRICT
    min: float = Field(..., gt=0, description="Smallest strength (> 0, finite).")
    max: float = Field(..., gt=0, description="Largest strength (>= min, finite).")
    count: int = Field(..., ge=1, le=10_000, description="Number of strengths (1-10 000).")

    @model_validator(mode="after")
    def _order(self) -> "StrengthRange":
        if not (np.isfinite(self.min) and np.isfinite(self.max)):
            raise ValueError("min and max must be finite")
        if self.max < self.min:
            raise ValueError(f"max ({self.max}) must be >= min ({self.min}); swap them")
        return self


class Penalty(BaseModel):
    """The penalty and the strengths λ to try."""
    model_config = _STRICT
    kind: Literal["l2", "l1", "elastic_net"] = Field(
        "l2", description="l2 (ridge), l1 (lasso) or elastic_net.")
    strengths: StrengthRange | list[float] = Field(
        default_factory=lambda: StrengthRange(min=1e-4, max=1e4, count=50),
        json_schema_extra=_list_branch({"min": 1e-4, "max": 1e4, "count": 50}, type="number", minimum=0),
        description="Penalty strengths λ: a log-spaced range, or an explicit list (each >= 0, no repeats; 0 only "
        "for l2, which is ordinary least squares).")
    l1_ratios: list[float] | None = Field(
        None, json_schema_extra=_list_branch(None, type="number", exclusiveMinimum=0, maximum=1), description="Elastic net mixing ratios in (0, 1]; default [0.2, 0.5, 0.9] for elastic_net; not "
        "allowed for l2.")

    @field_validator("strengths")
    @classmethod
    def _strengths(cls, v: StrengthRange | list[float]) -> StrengthRange | list[float]:
        if isinstance(v, list):
            if not v:
                raise ValueError("strengths must not be empty; pass e.g. [0.1, 1, 10] or {\"min\": 1e-4, \"max\": 1e4, \"count\": 50}")
            bad = [s for s in v if not (np.isfinite(s) and s >= 0)]
            if bad:
                raise ValueError(f"strengths must be >= 0 and finite, got {bad[0]}; a penalty strength cannot be negative")
            if len(set(v)) != len(v):
                raise ValueError(f"strengths must not repeat, got {v}")
        return v

    @field_validator("l1_ratios")
    @classmethod
    def _ratios(cls, v: list[float] | None) -> list[float] | None:
        if v is None:
            return v
        if not v:
            raise ValueError("l1_ratios must not be empty")
        bad = [r for r in v if not (0 < r <= 1)]
        if bad:
            raise ValueError(f"l1_ratios must lie in (0, 1], got {bad[0]}; use the l2 penalty for a ratio of 0")
        if len(set(v)) != len(v):
            raise ValueError(f"l1_ratios must not repeat, got {v}")
        return v

    @model_validator(mode="after")
    def _consistent(self) -> "Penalty":
        if self.kind == "l2" and self.l1_ratios is not None:
            raise ValueError("l1_ratios apply only to the elastic_net penalty; remove them or set kind to elastic_net")
        if self.kind == "l1" and self.l1_ratios not in (None, [1.0]):
            raise ValueError("the l1 penalty has l1_ratio 1; remove l1_ratios or set kind to elastic_net")
        if self.kind != "l2" and isinstance(self.strengths, list) and 0 in self.strengths:
            raise ValueError("strength 0 is allowed only for the l2 penalty (ordinary least squares); "
                             "use a positive strength for l1 and elastic_net")
        return self

    def strength_grid(self) -> np.ndarray:
        """Strengths in ascending order (a range is log-spaced, as numpy.geomspace)."""
        s = self.strengths
        if isinstance(s, StrengthRange):
            return np.geomspace(s.min, s.max, s.count)
        return np.array(sorted(s), dtype=float)

    def ratio_grid(self) -> list[float | None]:
        if self.kind == "l2":
            return [None]
        if self.kind == "l1":
            return [1.0]
        return list(self.l1_ratios or [0.2, 0.5, 0.9])


class CrossValidation(BaseModel):
    """How rows are split into folds."""
    model_config = _STRICT
    scheme: Literal["kfold", "repeated_kfold", "grouped", "time_ordered", "loo"] = Field(
        "kfold", description="kfold, repeated_kfold, grouped (group_by), time_ordered (order_by) or loo "
        "(exact leave-one-out, l2 only).")
    folds: int = Field(5, ge=2, le=1000, description="Number of folds (2-1000).")
    repeats: int = Field(3, ge=1, le=100, description="Repetitions for repeated_kfold (1-100).")
    seed: int = Field(0, ge=0, le=2**32 - 1, description="Seed of the fold assignment: equal seeds give equal folds.")
    group_by: str | None = Field(None, description="grouped: the column whose values never span two folds.")
    order_by: str | None = Field(None, description="time_ordered: the column that orders rows in time (numbers, or "
                                 "ISO-8601 dates and timestamps); each fold is validated on later rows only.")
    assignment: Literal["auto", "shuffle", "hash"] = Field(
        "auto", description="How kfold assigns rows: 'shuffle' is KFold(shuffle=True, random_state=seed); 'hash' "
        "puts a row in fold hash(row key, seed) mod folds, which a re-read of the same rows reproduces in any "
        "order or partitioning (needed out of core); 'auto' is shuffle in memory and hash when streaming.")
    row_key: str | None = Field(None, description="Column whose value identifies a row for hash assignment; "
                                "default: the row's position in the source.")

    @model_validator(mode="after")
    def _consistent(self) -> "CrossValidation":
        if self.scheme == "grouped" and not self.group_by:
            raise ValueError("the grouped scheme needs group_by, the column whose values must not be split across folds")
        if self.scheme == "time_ordered" and not self.order_by:
            raise ValueError("the time_ordered scheme needs order_by, the column that orders rows in time")
        return self


class Execution(BaseModel):
    model_config = _STRICT
    mode: Literal["auto", "memory", "streaming"] = Field(
        "auto", description="'memory' loads the table; 'streaming' reads it in row batches (out of core); "
        "'auto' streams sources larger than the service's streaming threshold.")
    batch_rows: int = Field(65_536, ge=256, le=10_000_000, description="Rows per batch when streaming.")


class Selection(BaseModel):
    """How the chosen point is picked from the CV table."""
    model_config = _STRICT
    metric: Literal["rmse", "mae", "r2"] = Field("rmse", description="The CV metric: rmse, mae or r2.")
    rule: Literal["best", "one_standard_error"] = Field(
        "best", description="best (lowest mean CV error) or one_standard_error (among candidates within one "
        "standard error of the best, the one with the smallest df; ESL 7.10).")


class TuneSpec(BaseModel):
    """A training spec (the JSON body of a training request). Only ``target`` is required.

    Attributes: ``target`` (column name); ``features`` (numeric column names, default: every numeric
    column with no other role); ``categorical`` (columns one-hot encoded); ``units`` (column → unit, for
    labels); ``bases`` (list of linear / polynomial(degrees) / rbf(widths, centers) settings to try);
    ``basis_fit`` ("all_rows" or "per_fold"); ``penalty`` (kind l2 / l1 / elastic_net, ``strengths``
    (range or list; ``strength_grid()`` gives the ascending (L,) array), ``l1_ratios``); ``cv`` (scheme,
    folds, repeats, seed, group_by, order_by, assignment, row_key); ``selection`` (metric rmse / mae / r2,
    rule best / one_standard_error); ``execution`` (mode, batch_rows). Frozen; validate dicts with
    ``parse_spec``, which raises ``InvalidSpec`` naming each field.
    """

    model_config = ConfigDict(extra="forbid", frozen=True, title="TuneSpec", json_schema_extra={
        "description": "The training spec. Only target is required; every other member has a default."})
    target: str = Field(..., min_length=1, description="The column to predict.")
    features: list[str] | None = Field(
        None, description="Numeric input columns; default: every numeric column but the target and the columns "
        "with another role.")
    categorical: list[str] = Field(default_factory=list, json_schema_extra={"default": []}, description="Category columns (text labels), one-hot "
                                   "encoded next to the basis terms.")
    units: dict[str, str] = Field(default_factory=dict, json_schema_extra={"default": {}}, description="Optional units per column, used in plot labels.")
    bases: list[Basis] = Field(
        default_factory=lambda: [LinearBasis(), PolynomialBasis(degrees=[2, 3, 4])], min_length=1,
        json_schema_extra={"default": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3, 4]}]},
        description="The basis settings to try (at least one), chosen jointly with the penalty strength.",
    )
    basis_fit: Literal["all_rows", "per_fold"] = Field(
        "all_rows", description="all_rows: scaling and RBF centres from all rows; per_fold: refit inside every fold.")
    penalty: Penalty = Field(default_factory=Penalty, description="The penalty and its strengths.")
    cv: CrossValidation = Field(default_factory=CrossValidation, description="The cross-validation scheme.")
    selection: Selection = Field(default_factory=Selection, description="How the chosen point is picked.")
    execution: Execution = Field(default_factory=Execution, description="In memory or streamed.")
    weight: str | None = Field(
        None, min_length=1, description="Column of non-negative row weights (weighted least squares, weighted input "
        "standardization, weighted CV metrics); a zero-weight row keeps its fold but contributes nothing.")

    @model_validator(mode="after")
    def _consistent(self) -> "TuneSpec":
        if self.weight is not None:
            roles = {"target": self.target, "cv.group_by": self.cv.group_by, "cv.order_by": self.cv.order_by,
                     "cv.row_key": self.cv.row_key}
            for role, col in roles.items():
                if col == self.weight:
                    raise ValueError(f"the weight column {self.weight!r} is also {role}; weights need a column of their own")
            if self.weight in (self.features or []) or self.weight in self.categorical:
                raise ValueError(f"the weight column {self.weight!r} cannot also be an input; remove it from features "
                                 "or categorical")
            if self.cv.scheme == "loo":
                raise ValueError("the loo scheme (exact leave-one-out) does not take row weights; use kfold")
        if self.features is not None:
            if not self.features and not self.categorical:
                raise ValueError("features must name at least one column (or leave it out to use all numeric columns)")
            if len(set(self.features)) != len(self.features):
                raise ValueError(f"features must not repeat, got {self.features}")
            if self.target in self.features:
                raise ValueError(f"the target {self.target!r} cannot also be a feature; remove it from features")
        if self.target in self.categorical:
            raise ValueError(f"the target {self.target!r} cannot be categorical; Tikhon fits regression models")
        if self.cv.scheme == "loo" and self.penalty.kind != "l2":
            raise ValueError("the loo scheme (exact leave-one-out) is available for the l2 penalty only; "
                             "use kfold for l1 and elastic_net")
        if self.cv.scheme == "loo" and self.basis_fit == "per_fold":
            raise ValueError("the loo scheme needs basis_fit all_rows")
        return self


def _loc(loc: tuple[Any, ...]) -> str:
    parts = [str(p) for p in loc if not (isinstance(p, str) and p in ("linear", "polynomial", "rbf", "function-after"))]
    return ".".join(parts) or "spec"


def parse_spec(spec: Any) -> TuneSpec:
    """Validate a dict (or pass a TuneSpec through). Raises ``InvalidSpec`` listing every problem."""
    if isinstance(spec, TuneSpec):
        return spec
    if not isinstance(spec, dict):
        raise InvalidSpec(f"the spec must be a JSON object, got {type(spec).__name__}; pass e.g. {{\"target\": \"y\"}}")
    try:
        return TuneSpec.model_validate(spec)
    except ValidationError as exc:
        errors = []
        for e in exc.errors(include_url=False):
            msg = e["msg"].removeprefix("Value error, ")
            ctx = e.get("ctx") or {}
            if e.get("type") == "literal_error":
                msg = choice_message(e.get("input"), ctx.get("expected", ""))
            elif e.get("type") == "union_tag_invalid":
                msg = choice_message(ctx.get("tag"), ctx.get("expected_tags", ""))
            field = _loc(e["loc"])
            if e.get("type") == "union_tag_invalid":
                field += "." + str(ctx.get("discriminator", "kind")).strip("'")
            errors.append({"field": field, "value": _jsonable(e.get("input")), "message": msg})
        first = errors[0]
        more = f" (and {len(errors) - 1} more problem(s))" if len(errors) > 1 else ""
        raise InvalidSpec(f"spec field '{first['field']}': {first['message']}{more}", errors=errors) from None


def _jsonable(v: Any) -> Any:
    if isinstance(v, (str, int, bool)) or v is None:
        return v
    if isinstance(v, float):
        return v if np.isfinite(v) else str(v)
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v][:20]
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in list(v.items())[:20]}
    return repr(v)[:200]
