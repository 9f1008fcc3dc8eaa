"""Request and response bodies of every route (separate per route), with strict numbers.

Inputs reject strings and booleans where numbers belong, and NaN or Infinity anywhere
(the framework parses the JSON literals ``NaN`` and ``Infinity``; these models refuse them).
The spec models describe the body for the OpenAPI document; the engine's
`CalibrationSpec.from_dict` then checks what they cannot (ranges, lengths, duplicate names).
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

from honing.engine.spec import MAX_UNIT_CHARS

__all__ = [
    "BudgetRequest",
    "CalibrationResponse",
    "CreateResponse",
    "HealthResponse",
    "ImportRequest",
    "ImportResponse",
    "LeaseRequest",
    "LeaseResponse",
    "PosteriorResponse",
    "Problem",
    "ReportRequest",
    "ReportResponse",
    "RunsResponse",
    "SamplesResponse",
    "SpecRequest",
]

Number = Annotated[float, Field(strict=True, allow_inf_nan=False)]
WholeNumber = Annotated[int, Field(strict=True)]
Name = Annotated[str, Field(min_length=1, max_length=64, pattern=r"^[A-Za-z0-9_.\-]+$")]
Status = Literal["collecting", "fitting", "converged", "budget_exhausted", "failed"]
RunState = Literal["leased", "done", "failed", "expired"]


class _Input(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)


class _Output(BaseModel):
    model_config = ConfigDict(extra="allow")


# The calibration spec


class UniformPrior(_Input):
    kind: Literal["uniform"]
    low: Number
    high: Number


class NormalPrior(_Input):
    kind: Literal["normal"]
    mean: Number
    sd: Number


class LogNormalPrior(_Input):
    kind: Literal["lognormal"]
    median: Number
    sigma_log: Number


class TruncNormalPrior(_Input):
    kind: Literal["truncnormal"]
    mean: Number
    sd: Number
    low: Number
    high: Number


class LogUniformPrior(_Input):
    kind: Literal["loguniform"]
    low: Number
    high: Number


Prior = Annotated[
    UniformPrior | NormalPrior | LogNormalPrior | TruncNormalPrior | LogUniformPrior,
    Field(discriminator="kind"),
]


class ParameterSpec(_Input):
    name: Name
    prior: Prior
    unit: str | None = Field(None, max_length=MAX_UNIT_CHARS)


class ObservationSpec(_Input):
    name: Name
    values: list[Number] = Field(min_length=1)
    sd: Number | list[Number] = Field(description="one sd for all values, or one per value")
    coords: list[Number] | None = None
    unit: str | None = Field(
        None, max_length=MAX_UNIT_CHARS, description="unit of the values, shown on plots"
    )
    coords_label: str | None = Field(
        None,
        max_length=MAX_UNIT_CHARS,
        description="what the coordinates are, with their unit (e.g. 'time [d]'), shown on plots",
    )


class NoiseSpec(_Input):
    scale: Literal["fixed", "estimate"] = "fixed"


class DesignSpec(_Input):
    initial_runs: WholeNumber | None = Field(
        default=None, description="default: max(10, 4 * (parameters + 1))"
    )
    batch_size: WholeNumber | None = Field(
        default=None, description="default: max(4, 2 * (parameters + 1))"
    )


class SurrogateSpec(_Input):
    max_degree: WholeNumber = 8
    retain_fraction: Number = 0.5


class BudgetSpec(_Input):
    max_runs: WholeNumber = 400


class BudgetChange(_Input):
    max_runs: WholeNumber = Field(description="the new run budget, larger than the current one")


class BudgetRequest(_Input):
    """Body of PATCH /v1/calibrations/{id}: a larger run budget (nothing else can change)."""

    budget: BudgetChange


class SpecRequest(_Input):
    """Body of POST /v1/calibrations: only name, parameters and observations are required."""

    name: str = Field(min_length=1, max_length=200)
    parameters: list[ParameterSpec] = Field(min_length=1)
    observations: list[ObservationSpec] = Field(min_length=1)
    noise: NoiseSpec | None = None
    design: DesignSpec | None = None
    surrogate: SurrogateSpec | None = None
    budget: BudgetSpec | None = None
    seed: WholeNumber = 0


class CreateResponse(_Output):
    id: str
    token: str
    status: Status


class CalibrationResponse(_Output):
    id: str
    name: str
    status: Status
    round: int
    runs_completed: int
    runs_failed: int
    runs_leased: int
    runs_queued: int
    created_at: str
    error: str | None = Field(description="why the calibration failed, when it did")
    spec: dict[str, Any] = Field(description="the spec with every default filled in")


# Runs


class LeaseRequest(_Input):
    count: WholeNumber = Field(default=1, ge=1, le=1000)
    worker: str = Field(default="anonymous", max_length=200)
    lease_seconds: Number | None = Field(
        default=None, ge=1, le=604800, description="default: the server's lease time"
    )


class LeasedRun(_Output):
    run_id: str
    parameters: dict[str, float]
    lease_expires_at: str


class LeaseResponse(_Output):
    runs: list[LeasedRun]
    status: Status


class LeaseExtension(_Input):
    lease_seconds: Number | None = Field(
        default=None, ge=1, le=604800, description="from now; default: the server's lease time"
    )


class LeaseExtended(_Output):
    run_id: str
    state: Literal["leased"]
    lease_expires_at: str


class ReportRequest(_Input):
    """Either ``outputs`` (one list of numbers per observation) or ``error``."""

    outputs: dict[str, list[Number]] | None = None
    error: str | None = Field(default=None, min_length=1, max_length=65536)

    @model_validator(mode="after")
    def _one_of(self) -> ReportRequest:
        if (self.outputs is None) == (self.error is None):
            raise ValueError("give exactly one of 'outputs' and 'error'")
        return self


class ReportResponse(_Output):
    run_id: str
    state: RunState
    trust: float | None


class ImportedRun(_Input):
    parameters: dict[str, Number]
    outputs: dict[str, list[Number]]


class ImportRequest(_Input):
    runs: list[ImportedRun] = Field(max_length=100_000)


class ImportResponse(_Output):
    imported: int


class RunView(_Output):
    run_id: str
    parameters: dict[str, float]
    state: RunState
    outputs: dict[str, list[float]] | None
    error: str | None
    trust: float | None
    worker: str | None
    leased_at: str | None
    lease_expires_at: str | None
    completed_at: str | None
    imported: bool


class RunsResponse(_Output):
    runs: list[RunView]


# Posterior


class ParameterSummary(_Output):
    mean: float | None = None
    sd: float | None = None
    median: float | None = None
    ci95: list[float | None] | None = None
    map: float | None = None
    prior_sd: float | None = None


class Diagnostics(_Output):
    trust_mean: float | None = None
    validation_error: float | None = None
    posterior_change: float | None = None
    surrogate_terms: int | None = None
    surrogate_degree: int | None = None
    converged: bool | None = None
    unmet_conditions: list[str] | None = Field(
        None,
        description="What still keeps the stop rule from holding, one plain phrase per "
        "condition with its value and round; empty once converged (an extension).",
    )
    suggested_max_runs: int | None = Field(
        None,
        description="When the run budget stopped the calibration: the smallest budget that "
        "leaves a batch for each round the stop rule still needs (an extension; raise it "
        "with PATCH on the calibration).",
    )


class PredictiveBand(_Output):
    mean: list[float | None]
    lo95: list[float | None]
    hi95: list[float | None]


class PosteriorResponse(_Output):
    round: int
    runs_completed: int
    runs_fitted: int = Field(
        description="Successful runs the posterior was fitted on; runs completed since then "
        "count in runs_completed and enter the next fit."
    )
    status: Status
    parameters: dict[str, ParameterSummary | None]
    correlation: list[list[float | None]]
    diagnostics: Diagnostics
    predictive: dict[str, PredictiveBand]


class SamplesResponse(_Output):
    names: list[str]
    samples: list[list[float]]


class HealthResponse(_Output):
    status: Literal["ok"]
    store: Literal["redis", "sqlite"]


class ProblemError(_Output):
    loc: list[str | int]
    msg: str


class Problem(_Output):
    """An RFC 9457 problem document."""

    type: str
    title: str
    status: int
    detail: str
    errors: list[ProblemError] | None = None
