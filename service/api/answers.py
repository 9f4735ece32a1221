"""Response models of the JSON routes: every answer is built through one of these models.

``reply(Model, body)`` validates the body a route assembled against its model and writes the model's
dump, so ``/openapi.json`` (which takes its response schemas from the same models, through each route's
``responses``) and the bytes on the wire cannot drift apart: a route that put out a field its model
does not declare, or a value of the wrong type, fails in the tests instead of shipping. Fields the route
left out stay out (``exclude_unset``), so optional members appear exactly when they did before.

Envelopes (what a route itself builds) forbid unknown members. Parts that come from the engine's
manifest body or from a worker's record (a chosen point, a CV summary, a job's decision) declare every
member they carry today and allow more (``additionalProperties: true``), because versions written by
older and newer releases are read by the same route.

Closed sets of values are enums with their own names in the document (``JobState``, ``Scope``, ...).
The training spec itself is ``service.engine.spec.TuneSpec`` (with its descriptions and bounds).
"""

from __future__ import annotations

from enum import StrEnum
from typing import Any, Literal, TypeVar

from fastapi.responses import Response
from pydantic import BaseModel, ConfigDict, Field, RootModel, with_config
from typing_extensions import NotRequired, TypedDict

from service.api.render import json_response
from service.engine.spec import TuneSpec

_CLOSED = ConfigDict(extra="forbid", use_enum_values=True)
_OPEN = ConfigDict(extra="allow", use_enum_values=True)

M = TypeVar("M", bound=BaseModel)


def reply(model: type[M], body: Any, *, status: int = 200, headers: dict[str, str] | None = None) -> Response:
    """The JSON answer ``body`` after validation by ``model`` (its dump, members left out stay out)."""
    return json_response(dump(model, body), status=status, headers=headers)


def dump(model: type[M], body: Any) -> Any:
    """``body`` validated by ``model`` and dumped, its members in the order the route wrote them (so an
    answer keeps the bytes it had before it went through a model)."""
    return _in_order(model.model_validate(body).model_dump(mode="json", exclude_unset=True, by_alias=True), body)


def _in_order(new: Any, old: Any) -> Any:
    if isinstance(new, (dict, list)) and type(old) is type(new) and new == old:
        return old  # equal values: the route's own object, in its own order (a C-speed comparison)
    if isinstance(new, dict) and isinstance(old, dict):
        out = {k: _in_order(new[k], old[k]) for k in old if k in new}
        out.update((k, v) for k, v in new.items() if k not in out)
        return out
    if isinstance(new, list) and isinstance(old, (list, tuple)) and len(new) == len(old) and new \
            and isinstance(new[0], (dict, list)):
        return [_in_order(n, o) for n, o in zip(new, old)]
    return new


def document(model: type[BaseModel], description: str, status: int = 200) -> dict[int, dict[str, Any]]:
    """A route's ``responses`` entry declaring ``model`` as its JSON answer."""
    return {status: {"model": model, "description": description}}


# --- closed sets --------------------------------------------------------------------------------------
class JobState(StrEnum):
    """The life of a training job: queued → running → succeeded | failed | cancelled."""
    queued = "queued"
    running = "running"
    succeeded = "succeeded"
    failed = "failed"
    cancelled = "cancelled"


class Promote(StrEnum):
    """Whether a trained version goes live: always; if its CV error beats the live version's on the new data
    (by min_improvement); or never."""
    always = "always"
    if_better = "if_better"
    never = "never"


class Scope(StrEnum):
    """What an API key may do: predict (predictions and reads), train (jobs and reads), admin (everything),
    metrics (the Prometheus scrape only)."""
    predict = "predict"
    train = "train"
    admin = "admin"
    metrics = "metrics"


class PlotFormat(StrEnum):
    """Image format of a figure."""
    svg = "svg"
    png = "png"


class Metric(StrEnum):
    """The cross-validated error measure."""
    rmse = "rmse"
    mae = "mae"
    r2 = "r2"


class SelectionRule(StrEnum):
    """How the CV table picks the chosen point."""
    best = "best"
    one_standard_error = "one_standard_error"


class PenaltyKind(StrEnum):
    """l2 (ridge), l1 (lasso) or elastic_net."""
    l2 = "l2"
    l1 = "l1"
    elastic_net = "elastic_net"


class CvScheme(StrEnum):
    """How rows are split into folds."""
    kfold = "kfold"
    repeated_kfold = "repeated_kfold"
    grouped = "grouped"
    time_ordered = "time_ordered"
    loo = "loo"


class BasisKind(StrEnum):
    linear = "linear"
    polynomial = "polynomial"
    rbf = "rbf"


class UnseenLevels(StrEnum):
    """A category level not seen in training: warn (the level's effect taken as zero, with a warning) or
    refuse (422 naming the row and the known levels)."""
    warn = "warn"
    refuse = "refuse"


class CvView(StrEnum):
    """best_per_basis: the best row of each basis setting; all: every row, in pages."""
    best_per_basis = "best_per_basis"
    all = "all"


# --- parts shared by several answers --------------------------------------------------------------------
# Parts repeated thousands of times in one answer (CV table rows and their basis) are TypedDicts: they
# validate to plain dicts, several times faster than model instances (benchmarks/bench_answers.py).
@with_config(_OPEN)
class BasisSetting(TypedDict):
    """One basis setting: linear, a polynomial degree, or an RBF width with its number of centres."""
    kind: BasisKind
    degree: NotRequired[int | None]
    width: NotRequired[float | None]
    centers: NotRequired[int | None]


class PenaltySetting(BaseModel):
    model_config = _OPEN
    kind: PenaltyKind
    strength: float | None = Field(None, description="Penalty strength λ.")
    l1_ratio: float | None = Field(None, description="Elastic net mixing ratio (1 for l1, null for l2).")


class CvPoint(BaseModel):
    """A point of the CV table: basis setting and penalty with its mean CV error."""
    model_config = _OPEN
    basis: BasisSetting
    penalty: PenaltySetting
    metric: Metric | None = None
    mean: float | None = Field(None, description="Mean CV metric over the splits (null when not finite).")
    std: float | None = Field(None, description="Population standard deviation over the splits.")
    se: float | None = Field(None, description="One-standard-error rule's standard error (sample std / √splits).")
    df: float | None = Field(None, description="Effective degrees of freedom (intercept excluded).")
    index: int | None = Field(None, description="Row of the CV table.")
    rule: SelectionRule | None = None


class CvSummary(BaseModel):
    model_config = _OPEN
    metric: Metric | None = None
    rule: SelectionRule | None = None
    scheme: CvScheme | None = None
    splits: int | None = None
    mean: float | None = None
    std: float | None = None
    rows: int | None = None
    basis_settings: int | None = None
    strengths: int | None = None
    l1_ratios: int | None = None
    candidates: int | None = None
    python: str | None = None


class SelectionSetting(BaseModel):
    model_config = _OPEN
    metric: Metric
    rule: SelectionRule


class Checksums(BaseModel):
    model_config = _CLOSED
    arrays_sha256: str | None = None
    manifest_sha256: str | None = None


class FeatureInfo(BaseModel):
    """An input column the model reads: a number with its training range, or a category with its levels."""
    model_config = _OPEN
    name: str
    type: str = Field(..., description="'number' or 'category'.")
    range: list[float | None] | None = Field(None, description="[min, max] seen in training (numbers).")
    levels: list[str] | None = Field(None, description="Levels seen in training (categories).")


class VersionLinks(BaseModel):
    model_config = _CLOSED
    cv: str
    path: str
    predictions: str


class VersionMetadata(BaseModel):
    """Everything about one version but its CV table and path (they have their own routes)."""
    model_config = _OPEN
    name: str
    version: int
    created_at: str | None = None
    job_id: str | None = None
    libraries: dict[str, str] | None = Field(None, description="Library versions that trained it.")
    checksums: Checksums
    spec: TuneSpec | None = Field(None, description="The training spec, with every default filled in.")
    chosen: CvPoint | None = None
    best_mean: CvPoint | None = None
    one_standard_error: CvPoint | None = None
    cv_summary: CvSummary | None = None
    data_fingerprint: dict[str, Any] | None = None
    feature_schema: list[FeatureInfo] | None = None
    residual_quantiles: dict[str, Any] | None = None
    model: dict[str, Any] | None = Field(None, description="The fitted model's description (basis, penalty, "
                                         "terms, intercept, ranges); its arrays are in the version's files.")
    warnings: list[str] | None = None
    lineage: dict[str, Any] | None = Field(
        None, description="A continued version (continue_from): parent_version, old_weight, new_rows, rows (all rows "
        "merged so far) and new_data_fingerprint (SHA-256 of the new rows); absent for a version trained from scratch.")
    continuation: dict[str, Any] | None = Field(
        None, description="What the version keeps to be continued: folds, summary groups (columns each), rows, "
        "positions and bytes of per-fold summaries; absent when it cannot be continued.")
    links: VersionLinks
    live: bool | None = Field(None, description="Whether this version is live (the version route only).")


# --- models and versions ----------------------------------------------------------------------------------
class ModelSummary(BaseModel):
    model_config = _CLOSED
    name: str
    live_version: int | None
    newest_version: int | None
    versions: int = Field(..., description="How many versions exist.")
    created_at: str | None
    updated_at: str | None


class ModelList(BaseModel):
    model_config = _CLOSED
    models: list[ModelSummary]


class ModelLinks(BaseModel):
    model_config = _CLOSED
    versions: str
    history: str
    trainings: str
    predictions: str
    inputs: str
    outcomes: str


class ModelDetail(BaseModel):
    model_config = _CLOSED
    name: str
    live_version: int | None
    newest_version: int | None
    versions: list[int] = Field(..., description="The version numbers that exist, oldest first.")
    created_at: str | None
    updated_at: str | None
    monitoring_warnings: list[str] = Field(..., description="'retrain suggested' warnings of the live version over "
                                           "the last 7 days (input drift, live error); see /inputs and /outcomes.")
    live_metadata: VersionMetadata | None = Field(None, description="The live version's metadata (absent: no live version).")
    links: ModelLinks


class VersionSummaryPart(BaseModel):
    model_config = _OPEN
    chosen: CvPoint | None = None
    cv_summary: CvSummary | None = None


class VersionRow(BaseModel):
    model_config = _CLOSED
    name: str
    version: int
    created_at: str | None
    job_id: str | None
    checksum: str | None = Field(..., description="SHA-256 of the manifest.")
    arrays_sha256: str | None
    bytes: int | None
    summary: VersionSummaryPart | None
    live: bool


class VersionList(BaseModel):
    model_config = _CLOSED
    name: str
    live_version: int | None
    versions: list[VersionRow]


@with_config(_OPEN)
class CvRow(TypedDict):
    """A row of the CV table: row (its number in the full table, best_per_basis view), basis, strength,
    l1_ratio, mean, std, se, df, split_values (the metric per split) and gcv (loo)."""
    row: NotRequired[int | None]
    basis: BasisSetting
    strength: float | None
    l1_ratio: NotRequired[float | None]
    mean: NotRequired[float | None]
    std: NotRequired[float | None]
    se: NotRequired[float | None]
    df: NotRequired[float | None]
    split_values: NotRequired[list[float | None] | None]
    gcv: NotRequired[float | None]


class CvLinks(BaseModel):
    model_config = _CLOSED
    all: str | None = None
    next: str | None = None


class CvTable(BaseModel):
    model_config = _CLOSED
    name: str
    version: int
    selection: SelectionSetting | None
    chosen: CvPoint | None
    summary: CvSummary | None
    view: CvView
    total: int
    offset: int | None = None
    limit: int | None = None
    table: list[CvRow]
    links: CvLinks


class RegularizationPath(BaseModel):
    model_config = _OPEN
    strengths: list[float] | None = None
    coefficients: list[list[float | None]] | None = Field(None, description="One row per strength, one column per term.")
    terms: list[str] | None = None
    df: list[float | None] | None = None
    chosen_strength: float | None = None


class PathAnswer(BaseModel):
    model_config = _CLOSED
    name: str
    version: int
    chosen: CvPoint | None
    path: RegularizationPath | None


class HistoryEntry(BaseModel):
    model_config = _CLOSED
    id: int | None
    name: str
    at: str
    actor: str
    from_version: int | None
    to_version: int | None
    reason: str
    details: dict[str, Any] | None
    version: int | None = Field(None, description="The version the entry is about.")
    went_live: bool | None = None
    decision: str | None = Field(None, description="'went live' or 'not made live'.")
    changed: bool | None = Field(None, description="In a set-live answer: whether the live version changed.")
    superseded: bool | None = None
    because: str | None = None


class History(BaseModel):
    model_config = _CLOSED
    name: str
    history: list[HistoryEntry]


class LiveChange(BaseModel):
    model_config = _CLOSED
    name: str
    live_version: int
    change: HistoryEntry
    already_live: bool
    detail: str | None = None


class PruneResult(BaseModel):
    model_config = _CLOSED
    name: str
    keep: int
    dry_run: bool
    deleted: list[int]
    live_version: int | None
    remaining: list[int]


# --- training jobs ------------------------------------------------------------------------------------
class JobProgress(BaseModel):
    model_config = _OPEN
    done: int
    total: int | None


class JobData(BaseModel):
    """Where the training data came from (kind rows, csv, upload or source) and what it held."""
    model_config = _OPEN
    kind: str
    rows: int | None = None
    columns: list[str] | None = None
    sha256: str | None = None
    source: str | None = None
    filename: str | None = None


class GridCounts(BaseModel):
    model_config = _OPEN
    fits: int | None = None
    basis_settings: int | None = None
    splits: int | None = None
    widest_basis: int | None = None
    cost_flops: float | None = None


class JobDecision(BaseModel):
    """Why the version went live or not: the promote mode, the metric and both figures."""
    model_config = _OPEN
    promote: Promote | None = None
    metric: Metric | None = None
    went_live: bool | None = None
    reason: str | None = None
    version: int | None = None


class ProblemError(BaseModel):
    """One field-level problem."""
    model_config = ConfigDict(extra="allow")
    field: str = Field(..., description="Dotted path of the field, column or parameter.")
    value: Any = Field(None, description="The value received (absent when the field was missing).")
    message: str = Field(..., description="What is wrong with it.")


class Problem(BaseModel):
    """RFC 9457 problem details. Extension members (request_id, errors, limit, allowed, received, checks)
    appear where they apply."""
    model_config = ConfigDict(extra="allow")
    type: str = Field(..., description="Problem type; GET it for a description.",
                      json_schema_extra={"format": "uri-reference"})
    title: str
    status: int | None = Field(None, ge=400, le=599)
    detail: str = Field(..., description="What is wrong and how to fix it.")
    instance: str | None = Field(None, json_schema_extra={"format": "uri-reference"})
    request_id: str | None = None
    errors: list[ProblemError] | None = Field(None, description="Field-level problems.")


class JobLinks(BaseModel):
    model_config = _CLOSED
    self: str
    model: str
    version: str | None = None


class Job(BaseModel):
    """A training job."""
    model_config = _CLOSED
    id: str
    model: str
    state: JobState
    progress: JobProgress
    attempts: int | None
    created_at: str | None
    started_at: str | None
    heartbeat_at: str | None
    finished_at: str | None
    version: int | None = Field(..., description="The version it published (succeeded jobs).")
    promote: Promote | None
    min_improvement: float | None
    data: JobData | None
    grid: GridCounts | None
    decision: JobDecision | None
    problem: Problem | None = Field(..., description="Why it failed (failed jobs).")
    links: JobLinks


class JobList(BaseModel):
    model_config = _CLOSED
    trainings: list[Job]


# --- keys ---------------------------------------------------------------------------------------------------
class ApiKey(BaseModel):
    model_config = _CLOSED
    key_id: str
    scopes: list[Scope]
    label: str
    created_at: str | None
    revoked_at: str | None
    active: bool


class NewApiKey(ApiKey):
    secret: str = Field(..., description="The key itself, shown only in this answer.")
    note: str


class ApiKeyList(BaseModel):
    model_config = _CLOSED
    keys: list[ApiKey]


# --- health -------------------------------------------------------------------------------------------------
class Health(BaseModel):
    model_config = _CLOSED
    status: str = Field(..., description="'ok'.")


class Readiness(BaseModel):
    model_config = _CLOSED
    status: str = Field(..., description="'ready'.")
    checks: dict[str, str] = Field(..., description="Each check ('catalog', 'store', 'versions') with 'ok' or what failed.")


class ProblemType(BaseModel):
    model_config = _CLOSED
    type: str
    title: str
    description: str


class ProblemTypes(RootModel[dict[str, ProblemType]]):
    """Every problem type, by slug."""


# --- figure data (Accept: application/json on a figure route) -------------------------------------------------
class FigureData(BaseModel):
    """The numbers a figure plots: ``figure`` says which (cv, path, residuals, history); the series differ."""
    model_config = _OPEN
    figure: str
    name: str
    version: int | None = None
    x: str | None = None
    y: str | None = None
    note: str | None = None
    metric: Metric | None = None
    chosen: dict[str, Any] | None = None
    series: list[dict[str, Any]] | None = None
    strengths: list[float] | None = None
    chosen_strength: float | None = None
    target: str | None = None
    rows: int | None = None
    predicted: list[float | None] | None = None
    observed: list[float | None] | None = None
    live_version: int | None = None
    points: list[dict[str, Any]] | None = None


# --- after training: monitoring and export ----------------------------------------------------------------------
class InputDrift(BaseModel):
    """One input: its training shares against the recent shares of the same bins."""
    model_config = _CLOSED
    name: str
    kind: Literal["numeric", "categorical"]
    psi: float | None = Field(..., description="Population stability index over the bins (None: no recent rows).")
    flag: Literal["watch", "act"] | None = Field(..., description="Rules of thumb: watch from 0.1, act from 0.25.")
    training: list[float] = Field(..., description="Training share of each bin.")
    recent: list[float] = Field(..., description="Recent share of each bin.")
    edges: list[float] | None = Field(None, description="Numeric: bin edges (bins: below the first edge, between "
                                      "edges, above the last).")
    outside_range: float | None = Field(None, description="Numeric: share of recent rows outside the training range.")
    levels: list[str] | None = Field(None, description="Categorical: the levels, then '(unseen)'.")


class PredictionDrift(BaseModel):
    model_config = _CLOSED
    edges: list[float]
    training: list[float]
    recent: list[float]
    psi: float | None


class HourCount(BaseModel):
    model_config = _CLOSED
    from_: str = Field(..., alias="from")
    to: str
    rows: int
    outside_range: float | None


class InputsReport(BaseModel):
    """Input drift of a version over a window of served predictions (counts per hour, over every process)."""
    model_config = ConfigDict(extra="forbid", populate_by_name=True)
    model: str
    version: int
    from_: str = Field(..., alias="from")
    to: str
    rows: int = Field(..., description="Rows served in the window.")
    features: list[InputDrift]
    prediction: PredictionDrift | None
    warnings: list[str]
    outside_range_rows: int | None = None
    unseen_level_rows: int | None = None
    high_leverage_rows: int | None = None
    series: list[HourCount] | None = None


class OutcomeMetrics(BaseModel):
    model_config = _CLOSED
    rmse: float | None
    mae: float | None
    coverage90: float | None = Field(..., description="Share of true values inside the 0.9 CV+ interval.")


class OutcomeHour(OutcomeMetrics):
    model_config = ConfigDict(extra="forbid", populate_by_name=True)
    from_: str = Field(..., alias="from")
    to: str
    rows: int


class CvFigure(BaseModel):
    model_config = _CLOSED
    metric: Metric | None
    mean: float | None
    std: float | None


class OutcomesReport(BaseModel):
    """Real-world error of scored outcomes against the version's CV error."""
    model_config = ConfigDict(extra="forbid", populate_by_name=True)
    model: str
    version: int
    from_: str = Field(..., alias="from")
    to: str
    rows: int
    metrics: OutcomeMetrics
    cv: CvFigure
    series: list[OutcomeHour]
    warnings: list[str]


class OutcomesAccepted(BaseModel):
    model_config = _CLOSED
    model: str
    version: int
    accepted: int = Field(..., description="Rows scored and counted.")
    skipped: int = Field(..., description="Rows whose prediction was not a finite number.")


class MonitoringFigureData(BaseModel):
    """The numbers a monitoring figure plots (a part of the /inputs or /outcomes report)."""
    model_config = ConfigDict(extra="allow", populate_by_name=True)
    model: str
    version: int
    from_: str = Field(..., alias="from")
    to: str
    rows: int


class ExportDocument(BaseModel):
    """A version as numbers to evaluate anywhere (format ``tikhon-export`` 1; the README shows an evaluator)."""
    model_config = _OPEN
    format: Literal["tikhon-export"]
    format_version: int
    target: str
    inputs: dict[str, Any] = Field(..., description="numeric (names), mean and scale of the input standardization.")
    basis: dict[str, Any] = Field(..., description="kind; polynomial: degree, powers; rbf: width, centers.")
    categorical: list[dict[str, Any]] = Field(..., description="Each categorical column's name and levels.")
    terms: list[str]
    weights: list[float] = Field(..., description="One coefficient per design column (basis terms, then indicators).")
    intercept: float
    penalty: dict[str, Any]
    cv: dict[str, Any]
    training: dict[str, Any]
    source: dict[str, Any] = Field(..., description="model, version, manifest_sha256, created_at.")
