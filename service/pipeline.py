"""The inspection pipeline: decode every upload, score them as one tensor batch, keep the heatmaps, commit the rows.
Nothing is stored unless every image of the request is accepted; rows are committed before the response is sent."""

from __future__ import annotations

import base64
import datetime as dt
import hashlib
import time
from dataclasses import dataclass

import numpy as np
import torch

from service.deps import ServiceState
from service.files import HeatmapRecord, new_id
from service.model_slot import LoadedModel
from service.overlay import overlay_png
from service.schemas import ImageInfo, InspectionCreated, InspectionOut, ModelRef, ReviewOut
from service.settings import Caller
from service.store import InspectionRecord, to_iso, utc_now
from training.data import decode_image

PRUNE_EVERY = 50  # inspections between retention sweeps


@dataclass(frozen=True)
class Upload:
    name: str  # for error messages only; never a path
    data: bytes
    part_id: str | None = None


def verdict_for(score: float, threshold: float) -> str:
    """The one convention: a part is flagged when score > threshold, otherwise it passes."""
    return "flag" if score > threshold else "pass"


def min_side(state: ServiceState, model: LoadedModel) -> int:
    """Images far smaller than the working size cannot show what the model learned: at least a quarter of it."""
    return max(state.settings.min_side, model.detector.cfg.size // 4)


@dataclass(frozen=True)
class Scored:
    x: torch.Tensor  # (B, C, S, S) the model's view of each image
    scores: np.ndarray  # (B,) higher = less like known-good
    heats: torch.Tensor  # (B, S, S) at the working resolution
    features: np.ndarray  # (B, F) for the drift window


def inspect_uploads(
    state: ServiceState, model: LoadedModel, caller: Caller, uploads: list[Upload], *, station: str | None, inline: bool
) -> list[InspectionCreated]:
    """Decodes, scores as one batch, stores. Raises BadImage / ImageTooLarge naming the image at fault, and then
    nothing is stored."""
    start = time.perf_counter()
    s = state.settings
    side = min_side(state, model)
    images = [decode_image(u.data, name=u.name, max_pixels=s.max_pixels, min_side=side) for u in uploads]
    scored = _score(state, model, images)
    ids = [new_id() for _ in uploads]
    for i, (inspection_id, upload) in enumerate(zip(ids, uploads)):
        h, w = images[i].shape[-2:]
        heat = HeatmapRecord(heat=scored.heats[i].numpy(), view=scored.x[i].numpy(), height=h, width=w)
        state.files.put_heatmap(inspection_id, heat)
        state.files.put_image(inspection_id, upload.data)
    now, elapsed = utc_now(), (time.perf_counter() - start) * 1000
    records = [
        _record(ids[i], now, upload, images[i], float(scored.scores[i]), model, caller, station, elapsed)
        for i, upload in enumerate(uploads)
    ]
    try:
        state.store.add_inspections(records=records)  # committed before the response goes out
    except BaseException:
        for inspection_id in ids:
            state.files.delete(inspection_id)
        raise
    model.drift.add(scored.features)
    for r in records:
        state.metrics.observe_inspection(r.verdict, r.score)
    return [_created(r, images[i], scored.heats[i].numpy(), inline=inline) for i, r in enumerate(records)]


def _score(state: ServiceState, model: LoadedModel, images: list[np.ndarray]) -> Scored:
    x = model.detector.prepare(images)  # (B, C, S, S)
    with state.gate:
        scores, heats, features = model.detector.score_and_embed(x)
    return Scored(x=x, scores=scores, heats=heats, features=features)


def _record(
    inspection_id: str,
    now: str,
    upload: Upload,
    image: np.ndarray,
    score: float,
    model: LoadedModel,
    caller: Caller,
    station: str | None,
    elapsed: float,
) -> InspectionRecord:
    det = model.detector
    return InspectionRecord(
        id=inspection_id,
        time=now,
        station=station,
        part_id=upload.part_id,
        caller=caller.name,
        image_sha256=hashlib.sha256(upload.data).hexdigest(),
        image_width=int(image.shape[-1]),
        image_height=int(image.shape[-2]),
        model_id=det.model_id,
        model_sha256=det.sha256,
        score=score,
        threshold=float(det.threshold),
        verdict=verdict_for(score, det.threshold),
        elapsed_ms=round(elapsed, 3),
    )


def _created(r: InspectionRecord, image: np.ndarray, heat: np.ndarray, *, inline: bool) -> InspectionCreated:
    png = None
    if inline:
        png = overlay_png(image, heat, height=r.image_height, width=r.image_width, threshold=r.threshold)
    return InspectionCreated(
        **inspection_out(r).model_dump(), heatmap_png=base64.b64encode(png).decode() if png else None
    )


def inspection_out(r: InspectionRecord) -> InspectionOut:
    review = None
    if r.review_label is not None:
        review = ReviewOut(label=r.review_label, operator=r.review_operator, time=r.review_time)
    return InspectionOut(
        id=r.id,
        time=dt.datetime.fromisoformat(r.time),
        station=r.station,
        part_id=r.part_id,
        verdict=r.verdict,
        score=r.score,
        threshold=r.threshold,
        model=ModelRef(id=r.model_id, sha256=r.model_sha256),
        image=ImageInfo(sha256=r.image_sha256, width=r.image_width, height=r.image_height),
        elapsed_ms=r.elapsed_ms,
        heatmap_url=f"/v1/inspections/{r.id}/heatmap.png" if r.files_kept else None,
        review=review,
    )


def prune_due(state: ServiceState, inspections: int) -> bool:
    """True once every PRUNE_EVERY inspections: the caller then schedules `prune` after its response."""
    with state.prune_lock:
        state.since_prune += inspections
        if state.since_prune >= PRUNE_EVERY:
            state.since_prune = 0
            return True
    return False


def prune(state: ServiceState) -> int:
    """Deletes the files retention no longer keeps (audit rows stay); returns how many inspections lost files."""
    s = state.settings
    before = to_iso(dt.datetime.now(dt.timezone.utc) - dt.timedelta(days=s.retention_days))
    total = 0
    while ids := state.store.expired_files(keep=s.retention_count, before=before):
        for inspection_id in ids:
            state.files.delete(inspection_id)
        state.store.mark_files_deleted(inspection_ids=ids)
        total += len(ids)
    return total
