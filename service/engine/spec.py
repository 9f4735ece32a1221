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


class LinearBasis(BaseModel):
    model_config = _STRICT
    kind: Literal["linear"] = "linear"


class PolynomialBasis(BaseModel):
    model_config = _STRICT
    kind: Literal["polynomial"] = "polynomial"
    degrees: list[int] = Field(default_factory=lambda: [1, 2, 3], min_length=1)

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
    model_config = _STRICT
    kind: Literal["rbf"] = "rbf"
    widths: list[float] = Field(default_factory=lambda: [0.5, 1.0, 2.0], min_length=1)
    centers: int = Field(100, ge=1, le=20_000)

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
    model_config = _STRICT
    min: float = Field(..., gt=0)
    max: float = Field(..., gt=0)
    count: int = Field(..., ge=1, le=10_000)

    @model_validator(mode="after")
    def _order(self) -> "StrengthRange":
        if not (np.isfinite(self.min) and np.isfinite(self.max)):
            raise ValueError("min and max must be finite")
        if self.max < self.min:
            raise ValueError(f"max ({self.max}) must be >= min ({self.min}); swap them")
        return self


class Penalty(BaseModel):
    model_config = _STRICT
    kind: Literal["l2", "l1", "elastic_net"] = "l2"
    strengths: StrengthRange | list[float] = Field(default_factory=lambda: StrengthRange(min=1e-4, max=1e4, count=50))
    l1_ratios: list[float] | None = None

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
    model_config = _STRICT
    scheme: Literal["kfold", "repeated_kfold", "grouped", "time_ordered", "loo"] = "kfold"
    folds: int = Field(5, ge=2, le=1000)
    repeats: int = Field(3, ge=1, le=100)
    seed: int = Field(0, ge=0, le=2**32 - 1)
    group_by: str | None = None
    order_by: str | None = None
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
    model_config = _STRICT
    metric: Literal["rmse", "mae", "r2"] = "rmse"
    rule: Literal["best", "one_standard_error"] = "best"


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

    model_config = _STRICT
    target: str = Field(..., min_length=1)
    features: list[str] | None = None
    categorical: list[str] = Field(default_factory=list)
    units: dict[str, str] = Field(default_factory=dict, description="Optional units per column, used in plot labels.")
    bases: list[Basis] = Field(
        default_factory=lambda: [LinearBasis(), PolynomialBasis(degrees=[2, 3, 4])], min_length=1
    )
    basis_fit: Literal["all_rows", "per_fold"] = "all_rows"
    penalty: Penalty = Field(default_factory=Penalty)
    cv: CrossValidation = Field(default_factory=CrossValidation)
    selection: Selection = Field(default_factory=Selection)
    execution: Execution = Field(default_factory=Execution)
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
