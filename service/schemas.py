"""Request and response bodies of REST v1. Requests forbid unknown fields; responses say what each field means."""

from __future__ import annotations

import datetime as dt
from typing import Literal

from knowngood.service.drift import Status
from pydantic import BaseModel, ConfigDict, Field, ValidationInfo, field_validator

Verdict = Literal["pass", "flag"]
Label = Literal["good", "defective"]
NO_CONTROL = r"^[^\x00-\x1f\x7f-\x9f]*$"  # text fields refuse C0 controls, DEL and C1 (log and CSV injection)
Operator = Field(min_length=1, max_length=100, pattern=NO_CONTROL, examples=["line 3, shift B"])
REASON_HELP = "why: kept with the model event"
# a defect class names a folder of a holdout (`defective/<class>/`): letters, digits, '_' and '-' only
DEFECT_CLASS = r"^[A-Za-z0-9][A-Za-z0-9_-]*$"


class ProblemOut(BaseModel):
    """RFC 9457 problem details; `errors` lists each invalid field of a 422."""

    type: str = Field(examples=["urn:knowngood:problem:bad-image"])
    title: str
    status: int
    detail: str
    errors: list[FieldErrorOut] | None = None


class FieldErrorOut(BaseModel):
    field: str
    message: str


class ModelRef(BaseModel):
    id: str = Field(description="model id: the first 16 hex digits of the weights' SHA-256")
    revision: str | None = Field(
        description="8 hex digits of the threshold section: changes with each threshold change while the id stays "
        "(null on rows stored before revisions were recorded)"
    )
    sha256: str = Field(description="SHA-256 of the bundle file")


class ImageInfo(BaseModel):
    sha256: str
    width: int
    height: int


class ReviewOut(BaseModel):
    label: Label
    operator: str
    time: dt.datetime
    defect_class: str | None = Field(description="only with label 'defective', when the operator named one")
    note: str | None


class ReviewList(BaseModel):
    """Every review of one inspection, oldest first: the last one is its current label."""

    items: list[ReviewOut]
    count: int


class InspectionOut(BaseModel):
    """One inspection as the audit store holds it. score: higher = less like known-good; flag when score > threshold."""

    id: str
    time: dt.datetime
    part_type: str = Field(description="the part type inspected: which model gave the verdict")
    station: str | None
    part_id: str | None
    verdict: Verdict
    score: float = Field(description="anomaly score, never negative; higher = less like the known-good parts")
    threshold: float = Field(description="the part is flagged when score > threshold")
    model: ModelRef
    image: ImageInfo
    elapsed_ms: float = Field(
        description="time the service spent decoding and scoring the images of this request (a batch: all of "
        "them), measured before the audit store write"
    )
    heatmap_url: str | None = Field(description="overlay PNG; null once retention has deleted the heatmap")
    image_kept: bool = Field(
        description="the uploaded file is kept (GET .../original): flagged parts by default, a share of passed ones"
    )
    review: ReviewOut | None = Field(description="the latest review: the current label (null: not reviewed)")
    review_count: int = Field(description="reviews kept for this inspection (GET .../reviews lists them)")


class InspectionCreated(InspectionOut):
    heatmap_png: str | None = Field(None, description="base64 PNG overlay, only with ?heatmap=inline")


class BatchCreated(BaseModel):
    items: list[InspectionCreated]
    elapsed_ms: float = Field(description="wall time for the whole batch, scored as one tensor batch")


class InspectionList(BaseModel):
    items: list[InspectionOut] = Field(description="newest first")
    count: int = Field(description="items on this page")
    total: int = Field(description="inspections matching the filters, on all pages")
    limit: int
    offset: int


class ReviewIn(BaseModel):
    """An operator's confirmation of a verdict."""

    model_config = ConfigDict(extra="forbid", strict=True)

    label: Label
    operator: str = Operator
    defect_class: str | None = Field(None, max_length=64, pattern=DEFECT_CLASS, examples=["scratch"])
    note: str | None = Field(None, max_length=500, pattern=NO_CONTROL)

    @field_validator("defect_class")
    @classmethod
    def _only_when_defective(cls, value: str | None, info: ValidationInfo) -> str | None:
        if value is not None and info.data.get("label") != "defective":
            raise ValueError("a defect class goes with label 'defective' only")
        return value


class ChangeIn(BaseModel):
    """Who rolls the model back and why: recorded with the model event."""

    model_config = ConfigDict(extra="forbid", strict=True)

    operator: str = Operator
    reason: str = Field(min_length=1, max_length=500, pattern=NO_CONTROL, description=REASON_HELP)


class ThresholdIn(BaseModel):
    """A new threshold for the current model: recorded with who, when and why."""

    model_config = ConfigDict(extra="forbid", strict=True)  # false is not 0.0 and "2.5" is not 2.5

    threshold: float = Field(ge=0, allow_inf_nan=False, description="flag when score > threshold")
    operator: str = Operator
    reason: str | None = Field(None, max_length=500, pattern=NO_CONTROL)


class ThresholdInfo(BaseModel):
    value: float
    method: str | None = Field(description="how it was chosen: conformal, tune, manual, ...")
    set_by: str | None
    set_at: str | None


PartTypeName = Field(
    pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$", description="a part type's name (letters, digits, '_', '.', '-')"
)


class ModelOut(BaseModel):
    part_type: str = Field(description="the part type this model inspects")
    id: str = Field(description="model id: derived from the weights")
    revision: str = Field(description="8 hex digits of the threshold section: changes with each threshold change")
    sha256: str
    threshold: ThresholdInfo
    size: int = Field(description="working resolution in px (square)")
    channels: int = Field(description="1 = grayscale, 3 = RGB")
    runtime: Literal["onnx", "torch"]
    loaded_at: dt.datetime
    source: str = Field(description="where this model came from: startup file, upload or rollback")
    previous: ModelRef | None = Field(description="what a rollback of this part type would restore")
    manifest: dict = Field(description="the bundle's manifest.json, as loaded (threshold changes included)")


class ModelEventOut(BaseModel):
    time: dt.datetime
    part_type: str
    kind: Literal["load", "swap", "rollback", "threshold"]
    model: ModelRef
    threshold: float
    previous_threshold: float | None
    caller: str = Field(description="the token's label (role and fingerprint, or its name in the tokens file)")
    operator: str | None
    reason: str | None


class ModelEventList(BaseModel):
    items: list[ModelEventOut]


class DriftOut(BaseModel):
    """Fréchet distance on the critic's features (whitened leading principal components): recent production
    images against the training reference."""

    status: Status
    drifting: bool | None = Field(description="null while there is not enough to say")
    detail: str
    part_type: str
    model_id: str
    images: int = Field(description="production images in the window for this model")
    needed: int = Field(description="images needed before drift is assessed")
    n: int | None = Field(description="sample size used for both the distance and its reference")
    distance: float | None
    reference_mean: float | None = Field(description="distance of n known-good holdout images, mean")
    reference_std: float | None
    limit: float | None = Field(
        description="drifting when distance > limit: the reference's tail quantile (drift_sigmas, as a normal's)"
    )


class PartTypeOut(BaseModel):
    name: str
    model: ModelRef
    threshold: float
    previous: ModelRef | None = Field(description="what a rollback would restore")


class PartTypeList(BaseModel):
    """The part types served, by name; each has its own model, threshold, rollback target and drift window."""

    items: list[PartTypeOut]
    count: int


class HealthOut(BaseModel):
    status: Literal["ok"]


class ReadyOut(BaseModel):
    ready: bool
    model_id: str | None = Field(description="the model, when exactly one part type is served")
    part_types: list[str] = Field(default_factory=list, description="the part types served")
    detail: str


ProblemOut.model_rebuild()
