"""Pydantic models that document the HTTP API in its OpenAPI schema.

Bodies are parsed by `codec` and `validation`, not by these models (FastAPI's own parser would
accept NaN and answer 500 on some inputs); the models say what is accepted and returned.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from stridecast.runtime.validation import OFF_GRID_POLICIES

# Non-empty, as the service refuses empty states. These generic schemas hold for any model;
# each served model's own paths carry its exact schemas (`model_schemas`).
Vector = Annotated[list[float], Field(min_length=1)]
Matrix = Annotated[list[Vector], Field(min_length=1)]
StateValue = Vector | Matrix
Time = Annotated[float, Field(ge=0)]
OffGrid = Literal[OFF_GRID_POLICIES]  # the runtime's list, unpacked by Literal


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class ErrorBody(BaseModel):
    """Every error: `error` names the problem (the inference protocol v2 error object)."""

    error: str
    code: str
    status: int


class AdvanceRequest(_Strict):
    """Advance one state `(d,)` or a batch `(B, d)` from time 0 to time `t`."""

    state: StateValue = Field(description="A state of d numbers, or a batch of such rows. In "
                                          "MessagePack also a typed array (see docs).")
    t: float = Field(ge=0, description="Time to reach, in the model's time unit.")
    off_grid: OffGrid = "interpolate"


class ForecastRequest(_Strict):
    """Forecast one state or a batch at every time in `times`."""

    state: StateValue
    times: list[Time] = Field(min_length=1, description="Times ≥ 0, any order.")
    off_grid: OffGrid = "interpolate"


class FindingBody(BaseModel):
    """One reason not to trust an answer (`Finding.to_dict()` of the runtime)."""

    kind: Literal["outside_box", "far_from_data", "off_subspace", "beyond_horizon", "no_validation"]
    message: str = Field(description="The runtime's sentence, shown as is.")
    states: list[int] = Field(description="Batch rows concerned (empty for time findings).")
    components: list[str]
    t: float | None = None
    amount: float | None = Field(None, description="How far: box widths, distance / radius, "
                                                   "or t / validated horizon.")


EXPECTED_ERROR = ("Held-out error of the deployed levels at this time (normalised RMS: error "
                  "per component over its training standard deviation, RMS over components); "
                  "null when the bundle records no validation curve or the time is past it.")
WARNINGS = "The messages of the findings that warrant a warning (the runtime's wording)."


class PlanBody(BaseModel):
    """How the answer was produced (`Plan.to_dict()` of the runtime)."""

    t: float
    base_steps: int
    steps: list[list[int]] = Field(description="[stride, count] pairs, coarsest first.")
    evaluations: int
    remainder: float
    method: str
    expected_error: float | None = Field(None, description=EXPECTED_ERROR)
    findings: list[FindingBody] = []


class AdvanceResponse(BaseModel):
    model: str
    state: StateValue
    t: float
    plan: PlanBody
    method: str = Field(description='"grid", "interpolate", "nearest", ...')
    evaluations: int
    dtype: str
    expected_error: float | None = Field(description=EXPECTED_ERROR)
    findings: list[FindingBody]
    warnings: list[str] = Field(description=WARNINGS)


class ForecastResponse(BaseModel):
    model: str
    times: list[float]
    states: list[Any] = Field(description="Shape (len(times), *state.shape).")
    evaluations: int
    network_calls: int
    depth: int
    methods: list[str]
    dtype: str
    expected_error: list[float | None] = Field(description="One per requested time. "
                                               + EXPECTED_ERROR)
    findings: list[FindingBody]
    warnings: list[str] = Field(description=WARNINGS)


class ModelSummary(BaseModel):
    name: str
    ready: bool
    source: str
    error: str | None = None
    state_dim: int | None = None
    base_step: float | None = None
    time_unit: str | None = None
    strides: list[int] | None = None


class ModelList(BaseModel):
    models: list[ModelSummary]


class StateInfo(BaseModel):
    dim: int
    names: list[str]
    units: list[str]


class TimeInfo(BaseModel):
    base_step: float
    unit: str


class Envelope(BaseModel):
    min: list[float]
    max: list[float]


class ModelDetail(BaseModel):
    name: str
    description: str
    state: StateInfo
    time: TimeInfo
    strides: list[int]
    update: str
    envelope: Envelope | None
    validated_horizon: float | None
    dtype: str


class Health(BaseModel):
    status: str


class Readiness(BaseModel):
    ready: bool
    models: int
    failed: int


# --- Open Inference Protocol v2 (kserve/open-inference-protocol, inference_rest.md) ---------

class MetadataTensor(BaseModel):
    name: str
    datatype: str
    shape: list[int]


class V2ModelMetadata(BaseModel):
    name: str
    versions: list[str] | None = None
    platform: str
    inputs: list[MetadataTensor]
    outputs: list[MetadataTensor]


class V2ServerMetadata(BaseModel):
    name: str
    version: str
    extensions: list[str]


class V2Live(BaseModel):
    live: bool


class V2Ready(BaseModel):
    ready: bool


class V2ModelReady(BaseModel):
    name: str
    ready: bool


Parameters = dict[str, str | float | bool]


class InferRequestInput(_Strict):
    """`state` [B, d] (FP32 or FP64) or `t` [1] or [B] (times ≥ 0). `data` holds the product of
    `shape` numbers, flat or nested; with the binary extension `parameters.binary_data_size`
    replaces it (see the request description)."""

    name: Literal["state", "t"]
    shape: list[Annotated[int, Field(ge=0)]] = Field(min_length=1, max_length=2)
    datatype: Literal["FP32", "FP64", "INT32", "INT64"]
    parameters: Parameters | None = None
    data: list[Any] = Field(min_length=1)


class InferRequestOutput(_Strict):
    name: Literal["state"]
    parameters: Parameters | None = None


class InferRequest(_Strict):
    """Inputs `state` [B, d] and `t` [1] or [B]; parameter `off_grid` is optional.

    `model_name` and `model_version`, which some clients add, are accepted when they match the
    path."""

    id: str | None = None
    parameters: Parameters | None = None
    inputs: list[InferRequestInput] = Field(min_length=2, max_length=2)
    outputs: list[InferRequestOutput] | None = None


class InferResponseOutput(BaseModel):
    name: str
    shape: list[int]
    datatype: str
    parameters: Parameters | None = None
    data: list[Any]


class InferResponse(BaseModel):
    model_name: str
    id: str | None = None
    parameters: Parameters | None = None
    outputs: list[InferResponseOutput]


REQUEST_MODELS: tuple[type[BaseModel], ...] = (AdvanceRequest, ForecastRequest, InferRequest)
