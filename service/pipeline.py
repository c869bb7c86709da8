"""The inspection pipeline: decode every upload, score them as one tensor batch, keep the heatmaps, commit the rows.
Nothing is stored unless every image of the request is accepted; rows are committed before the response is sent."""

from __future__ import annotations

import base64
import dataclasses
import datetime as dt
import hashlib
import logging
import time
from dataclasses import dataclass
from typing import BinaryIO

import numpy as np
import torch
import torch.nn.functional as F
from knowngood.service.deps import ServiceState
from knowngood.service.files import HeatmapRecord, heatmap_bytes, new_id
from knowngood.service.model_slot import LoadedModel, ModelSlot
from knowngood.service.overlay import overlay_base, overlay_png, overlay_size
from knowngood.service.schemas import ImageInfo, InspectionCreated, InspectionOut, ModelRef, ReviewOut
from knowngood.service.settings import Caller
from knowngood.service.store import InspectionRecord, Review, StoredFiles, to_iso, utc_now
from knowngood.training.data import decode_image, min_side_for
from knowngood.training.detector import Prepared, verdict
from knowngood.training.errors import BadImage

log = logging.getLogger("knowngood.service")

PRUNE_EVERY = 50  # inspections between retention sweeps


@dataclass(frozen=True)
class Upload:
    name: str  # for error messages only; never a path
    file: BinaryIO  # the spooled upload: read only once a decode slot is free
    part_id: str | None = None


verdict_for = verdict  # the one convention (training.detector.verdict): flagged when score > threshold


def min_side(state: ServiceState, model: LoadedModel) -> int:
    """Images far smaller than the working size cannot show what the model learned: the command line's rule."""
    return min_side_for(model.detector.cfg.size, state.settings.min_side)


@dataclass(frozen=True)
class Decoded:
    """What is kept of one upload while the batch is scored: never the full-size float image."""

    prepared: Prepared  # the model's view: the whole image at the working shape, or its tiles
    view: np.ndarray  # (C, h, w) what the stored overlay is drawn on
    height: int
    width: int
    sha256: str
    base: np.ndarray | None  # (C, h, w) the image at overlay size, only for ?heatmap=inline


def inspect_uploads(
    state: ServiceState, slot: ModelSlot, caller: Caller, uploads: list[Upload], *, station: str | None, inline: bool
) -> list[InspectionCreated]:
    """Decodes (each in a decode slot), scores as one batch (in the scoring slot) with the part type's current
    model, stores rows, heatmaps, kept images and drift features in one transaction. Raises BadImage /
    ImageTooLarge naming the image at fault, or Problem(503) when the service is busy; then nothing is stored.
    Everything that can fail happens before the rows are committed; after the commit only best-effort work."""
    start = time.perf_counter()
    model = slot.get()  # once: a swap meanwhile does not change the model under this request
    decoded = [_decode(state, model, u, inline=inline) for u in uploads]
    det = model.detector
    x = torch.cat([d.prepared.x for d in decoded])  # (B, C, S, S): images, or all tiles of all images
    with state.scoring.enter():
        tile_scores, tile_heats, tile_features = det.score_and_embed(x)
    scores, heats, features, start_row = [], [], [], 0
    for d in decoded:
        rows = slice(start_row, start_row + len(d.prepared.x))
        start_row = rows.stop
        score, heat, feature = det.finish(d.prepared, tile_scores[rows], tile_heats[rows], tile_features[rows])
        if d.prepared.boxes is not None:  # a stitched full-resolution map: kept at overlay size, peaks kept
            heat = F.adaptive_max_pool2d(heat[None, None], overlay_size(d.height, d.width))[0, 0]
        scores.append(score)
        heats.append(heat)
        features.append(feature)
    features = np.stack(features)
    for u, score in zip(uploads, scores):
        if not np.isfinite(score):
            raise BadImage(f"{u.name}: the model gives a non-finite score for this image; it is not recorded")
    ids = [new_id() for _ in uploads]
    now, elapsed = utc_now(), (time.perf_counter() - start) * 1000
    records = [
        _record(ids[i], now, u, decoded[i], float(scores[i]), model, caller, station, elapsed, slot.part_type)
        for i, u in enumerate(uploads)
    ]
    records = [dataclasses.replace(r, image_kept=_keep_image(state.settings, r.verdict, r.id)) for r in records]
    out = [_created(r, decoded[i], heats[i].numpy(), inline=inline) for i, r in enumerate(records)]
    files = [
        StoredFiles(
            heatmap=heatmap_bytes(HeatmapRecord(heat=heats[i].numpy(), view=d.view, height=d.height, width=d.width)),
            image=_reread(uploads[i]) if records[i].image_kept else None,
            embedding=np.asarray(features[i], dtype=np.float32).tobytes(),
        )
        for i, d in enumerate(decoded)
    ]
    state.store.add_inspections(records=records, files=files)  # one transaction, before the response goes out
    _after_commit(state, slot, records)
    return out


def _keep_image(settings, verdict: str, inspection_id: str) -> bool:
    """Flagged parts' images are kept (what operators review and retraining needs); a share of passed ones when
    asked, chosen by the random id, so the sample is unbiased."""
    if settings.keep_images != "flagged":
        return settings.keep_images == "all"
    return verdict == "flag" or int(inspection_id[:8], 16) / 2**32 < settings.keep_passed_share


def _reread(upload: Upload) -> bytes:
    """The upload as sent, read again from its spooled file only when it is kept: no request holds its bytes
    while it waits for the scoring pass."""
    upload.file.seek(0)
    return upload.file.read()


def _decode(state: ServiceState, model: LoadedModel, upload: Upload, *, inline: bool) -> Decoded:
    s = state.settings
    with state.decoding.enter():
        data = upload.file.read()
        image = decode_image(data, name=upload.name, max_pixels=s.max_pixels, min_side=min_side(state, model))
        h, w = image.shape[-2:]
        prepared = model.detector.prepare_one(image)
        return Decoded(
            prepared=prepared,
            # what the stored overlay is drawn on: the model's view, or a tiled model's image at overlay size
            view=prepared.x[0].numpy() if prepared.boxes is None else overlay_base(image),
            height=int(h),
            width=int(w),
            sha256=hashlib.sha256(data).hexdigest(),
            base=overlay_base(image) if inline else None,
        )


def _after_commit(state: ServiceState, slot: ModelSlot, records: list[InspectionRecord]) -> None:
    """Metrics: the rows are committed, so a failure here is logged, never answered."""
    try:
        for r in records:
            state.metrics.observe_inspection(slot.part_type, r.verdict, r.score)
    except Exception:
        log.exception("after committing inspections %s", ", ".join(r.id for r in records))


def _record(
    inspection_id: str,
    now: str,
    upload: Upload,
    decoded: Decoded,
    score: float,
    model: LoadedModel,
    caller: Caller,
    station: str | None,
    elapsed: float,
    part_type: str,
) -> InspectionRecord:
    det = model.detector
    return InspectionRecord(
        id=inspection_id,
        time=now,
        part_type=part_type,
        station=station,
        part_id=upload.part_id,
        caller=caller.name,
        image_sha256=decoded.sha256,
        image_width=decoded.width,
        image_height=decoded.height,
        model_id=det.model_id,
        model_revision=det.revision,
        model_sha256=det.sha256,
        score=score,
        threshold=float(det.threshold),
        verdict=verdict_for(score, det.threshold),
        elapsed_ms=round(elapsed, 3),
    )


def _created(r: InspectionRecord, decoded: Decoded, heat: np.ndarray, *, inline: bool) -> InspectionCreated:
    png = None
    if inline:
        png = overlay_png(decoded.base, heat, height=r.image_height, width=r.image_width, threshold=r.threshold)
    return InspectionCreated(
        **inspection_out(r).model_dump(), heatmap_png=base64.b64encode(png).decode() if png else None
    )


def review_out(r: Review) -> ReviewOut:
    return ReviewOut(label=r.label, operator=r.operator, time=r.time, defect_class=r.defect_class, note=r.note)


def inspection_out(r: InspectionRecord) -> InspectionOut:
    review = None
    if r.review_label is not None:  # the latest review is the current label
        review = ReviewOut(
            label=r.review_label,
            operator=r.review_operator,
            time=r.review_time,
            defect_class=r.review_defect_class,
            note=r.review_note,
        )
    return InspectionOut(
        id=r.id,
        time=dt.datetime.fromisoformat(r.time),
        part_type=r.part_type,
        image_kept=r.image_kept and r.files_kept,
        station=r.station,
        part_id=r.part_id,
        verdict=r.verdict,
        score=r.score,
        threshold=r.threshold,
        model=ModelRef(id=r.model_id, revision=r.model_revision, sha256=r.model_sha256),
        image=ImageInfo(sha256=r.image_sha256, width=r.image_width, height=r.image_height),
        elapsed_ms=r.elapsed_ms,
        heatmap_url=f"/v1/inspections/{r.id}/heatmap.png" if r.files_kept else None,
        review=review,
        review_count=r.review_count,
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
        state.store.mark_files_deleted(inspection_ids=ids)
        total += len(ids)
    return total
