"""Inspections: score an image (or a batch), read them back, draw the heatmap, record an operator's review."""

from __future__ import annotations

import time
from typing import Annotated, Literal

import numpy as np
from fastapi import APIRouter, BackgroundTasks, Depends, File, Form, Query, Request, Response, UploadFile
from fastapi.exceptions import RequestValidationError
from knowngood.service import problems
from knowngood.service.deps import ServiceState, State, StationCaller, Window
from knowngood.service.overlay import overlay_png
from knowngood.service.pipeline import Upload, inspect_uploads, inspection_out, prune, prune_due, review_out
from knowngood.service.problems import Problem
from knowngood.service.schemas import (
    NO_CONTROL,
    BatchCreated,
    InspectionCreated,
    InspectionList,
    InspectionOut,
    ReviewIn,
    ReviewList,
    Verdict,
)
from knowngood.service.settings import PART_TYPE
from knowngood.service.store import InspectionFilter, InspectionRecord
from knowngood.training.data import decode_image
from knowngood.training.errors import KnowngoodError
from pydantic import StringConstraints

router = APIRouter(prefix="/v1/inspections", tags=["inspections"])
Text = Annotated[str | None, Form(max_length=200, pattern=NO_CONTROL)]
PartIds = Annotated[
    list[Annotated[str, StringConstraints(max_length=200, pattern=NO_CONTROL)]] | None,
    Form(description="none, or one per image in order"),
]
QueryText = Annotated[str | None, Query(max_length=200, pattern=NO_CONTROL, description="exact match")]
PartType = Annotated[
    str | None,
    Form(
        max_length=64, pattern=PART_TYPE, description="the part type to inspect as; may be omitted while one is served"
    ),
]
MAX_OFFSET = 2**53  # far beyond any store, and still an integer SQLite and JSON both hold exactly
Inline = Annotated[Literal["inline"] | None, Query(description="'inline' adds the overlay PNG as base64")]
IMAGE_HELP = "PNG, JPEG, BMP or TIFF (8 or 16 bit; gray, RGB or CMYK); checked by decoding, not by name"


def _name(upload: UploadFile, label: str) -> str:
    filename = (upload.filename or "")[:80]
    return f"{label} {filename!r}" if filename else label


def _find(state: ServiceState, inspection_id: str) -> InspectionRecord:
    record = state.store.get_inspection(inspection_id=inspection_id)
    if record is None:
        raise Problem(404, f"no inspection with id {inspection_id[:64]!r}")
    return record


def _once(*names: str):
    """A dependency refusing a second copy of a single-valued form field (which FastAPI would silently drop)."""

    async def check(request: Request) -> None:
        form = await request.form()  # already parsed for the route: this reads the cached form
        twice = [(n, len(form.getlist(n))) for n in names if len(form.getlist(n)) > 1]
        if twice:
            raise RequestValidationError(
                [{"loc": ("body", n), "msg": f"sent {k} times; send it once", "type": "value_error"} for n, k in twice]
            )

    return Depends(check)


def _after(state: ServiceState, background: BackgroundTasks, count: int) -> None:
    if prune_due(state, count):
        background.add_task(prune, state)


@router.post(
    "",
    response_model=InspectionCreated,
    responses=problems.responses(400, 401, 404, 409, 413, 422, 503),
    dependencies=[_once("image", "part_id", "station", "part_type")],
)
def create_inspection(
    state: State,
    caller: StationCaller,
    background: BackgroundTasks,
    image: Annotated[UploadFile, File(description=IMAGE_HELP)],
    part_type: PartType = None,
    part_id: Text = None,
    station: Text = None,
    heatmap: Inline = None,
) -> InspectionCreated:
    """Inspect one image: verdict, anomaly score and threshold, committed to the audit store before the reply."""
    slot = state.parts.resolve(part_type)
    upload = Upload(name=_name(image, "image"), file=image.file, part_id=part_id)
    [out] = inspect_uploads(state, slot, caller, [upload], station=station, inline=heatmap == "inline")
    _after(state, background, 1)
    return out


@router.post(
    "/batch",
    response_model=BatchCreated,
    responses=problems.responses(400, 401, 404, 409, 413, 422, 503),
    dependencies=[_once("station", "part_type")],
)
def create_batch(
    state: State,
    caller: StationCaller,
    background: BackgroundTasks,
    images: Annotated[list[UploadFile], File(description=f"one field per image; {IMAGE_HELP}")],
    part_type: PartType = None,
    part_id: PartIds = None,
    station: Text = None,
    heatmap: Inline = None,
) -> BatchCreated:
    """Inspect several images scored as one tensor batch; all are stored, or none if any is refused."""
    start = time.perf_counter()
    slot = state.parts.resolve(part_type)
    limit = state.settings.max_batch
    if len(images) > limit:
        raise Problem(422, f"{len(images)} images in one batch; the limit is {limit} (KNOWNGOOD_MAX_BATCH)")
    parts = part_id or []
    if parts and len(parts) != len(images):
        raise Problem(422, f"{len(parts)} part_id fields for {len(images)} images: send none or one per image")
    uploads = [
        Upload(name=_name(f, f"images[{i}]"), file=f.file, part_id=parts[i] if parts else None)
        for i, f in enumerate(images)
    ]
    items = inspect_uploads(state, slot, caller, uploads, station=station, inline=heatmap == "inline")
    _after(state, background, len(items))
    return BatchCreated(items=items, elapsed_ms=(time.perf_counter() - start) * 1000)


@router.get("", response_model=InspectionList, responses=problems.responses(401, 422))
def list_inspections(
    state: State,
    caller: StationCaller,
    window: Window,
    part_type: Annotated[str | None, Query(max_length=64, pattern=PART_TYPE, description="exact match")] = None,
    station: QueryText = None,
    part_id: QueryText = None,
    verdict: Verdict | None = None,
    reviewed: Annotated[bool | None, Query(description="true = has a review; false = awaiting review")] = None,
    limit: Annotated[int, Query(ge=1, le=1000, description="rows on this page")] = 100,
    offset: Annotated[int, Query(ge=0, le=MAX_OFFSET, description="matching rows skipped, newest first")] = 0,
) -> InspectionList:
    """Inspections matching every filter given, newest first, paged; verdict=flag&reviewed=false is the review queue."""
    where = InspectionFilter(
        part_type=part_type,
        verdict=verdict,
        station=station,
        part_id=part_id,
        reviewed=reviewed,
        since=window.since,
        until=window.until,
    )
    records, total = state.store.find_inspections(where=where, limit=limit, offset=offset)
    return InspectionList(
        items=[inspection_out(r) for r in records], count=len(records), total=total, limit=limit, offset=offset
    )


@router.get("/{inspection_id}", response_model=InspectionOut, responses=problems.responses(401, 404, 422))
def get_inspection(state: State, caller: StationCaller, inspection_id: str) -> InspectionOut:
    """One inspection as the audit store holds it, with its review if there is one."""
    return inspection_out(_find(state, inspection_id))


PNG_RESPONSES = {200: {"content": {"image/png": {}}, "description": "a PNG image"}, **problems.responses(401, 404, 422)}


@router.get("/{inspection_id}/heatmap.png", response_class=Response, response_model=None, responses=PNG_RESPONSES)
def get_heatmap(state: State, caller: StationCaller, inspection_id: str) -> Response:
    """The heatmap overlay PNG at the image's own resolution (long side at most 2048 px)."""
    return _picture(state, _find(state, inspection_id), tinted=True)


@router.get("/{inspection_id}/image.png", response_class=Response, response_model=None, responses=PNG_RESPONSES)
def get_image(state: State, caller: StationCaller, inspection_id: str) -> Response:
    """The inspected image as its overlay shows it, without the tint: same size, to compare side by side."""
    return _picture(state, _find(state, inspection_id), tinted=False)


def _picture(state: ServiceState, record: InspectionRecord, *, tinted: bool) -> Response:
    heat = state.files.get_heatmap(record.id) if record.files_kept else None
    if heat is None:
        raise Problem(
            404,
            f"the {'heatmap' if tinted else 'image'} of inspection {record.id} is no longer kept (retention: "
            "KNOWNGOOD_RETENTION_COUNT, KNOWNGOOD_RETENTION_DAYS)",
        )
    image = heat.view
    original = state.files.get_image(record.id)
    if original is not None:
        try:
            image = decode_image(original, name=record.id, max_pixels=max(state.settings.max_pixels, 1), min_side=1)
        except KnowngoodError:
            pass  # it was decoded once when scored; if it cannot be now, the model's view still shows the part
    heatmap = heat.heat if tinted else np.zeros_like(heat.heat)  # no heat, no tint: the image alone, same geometry
    png = overlay_png(image, heatmap, height=heat.height, width=heat.width, threshold=record.threshold)
    return Response(png, media_type="image/png", headers={"Cache-Control": "private, max-age=86400"})


@router.get(
    "/{inspection_id}/original",
    response_class=Response,
    response_model=None,
    responses={
        200: {"content": {"application/octet-stream": {}}, "description": "the file as uploaded"},
        **problems.responses(401, 404, 422),
    },
)
def get_original(state: State, caller: StationCaller, inspection_id: str) -> Response:
    """The uploaded file as sent (kept for flagged parts by default): what `knowngood export-reviews` downloads."""
    record = _find(state, inspection_id)
    data = state.files.get_image(record.id) if record.files_kept else None
    if data is None:
        raise Problem(
            404,
            f"the image of inspection {record.id} is not kept (KNOWNGOOD_KEEP_IMAGES, KNOWNGOOD_KEEP_PASSED_SHARE, "
            "retention)",
        )
    return Response(
        data,
        media_type="application/octet-stream",
        headers={"Content-Disposition": f'attachment; filename="{record.id}"', "Cache-Control": "private"},
    )


@router.post("/{inspection_id}/review", response_model=InspectionOut, responses=problems.responses(401, 404, 422))
def review_inspection(state: State, caller: StationCaller, inspection_id: str, review: ReviewIn) -> InspectionOut:
    """Record an operator's confirmation (good or defective); all reviews are kept, the latest is the label."""
    record = state.store.add_review(
        inspection_id=inspection_id,
        label=review.label,
        operator=review.operator,
        caller=caller.name,
        defect_class=review.defect_class,
        note=review.note,
    )
    if record is None:
        raise Problem(404, f"no inspection with id {inspection_id[:64]!r}")
    return inspection_out(record)


@router.get("/{inspection_id}/reviews", response_model=ReviewList, responses=problems.responses(401, 404, 422))
def list_reviews(state: State, caller: StationCaller, inspection_id: str) -> ReviewList:
    """Every review of one inspection, oldest first: who, when, the label, defect class and note."""
    _find(state, inspection_id)
    reviews = state.store.reviews(inspection_id=inspection_id)
    return ReviewList(items=[review_out(r) for r in reviews], count=len(reviews))
