"""Operations: liveness, readiness, Prometheus metrics, drift, the CSV export and the operator page."""

from __future__ import annotations

import csv
import io
from collections.abc import Iterator
from dataclasses import fields
from pathlib import Path

import numpy as np
from fastapi import APIRouter
from fastapi.responses import FileResponse, HTMLResponse, JSONResponse, PlainTextResponse, Response, StreamingResponse
from knowngood.service import problems
from knowngood.service.deps import ServiceState, State, StationCaller, Window
from knowngood.service.drift import DriftReport
from knowngood.service.metrics import CONTENT_TYPE, Served
from knowngood.service.model_slot import LoadedModel, ModelSlot
from knowngood.service.overlay import legend_png
from knowngood.service.schemas import DriftOut, HealthOut, ReadyOut
from knowngood.service.settings import Caller, shown_to
from knowngood.service.store import InspectionRecord

router = APIRouter(tags=["operations"])
STATIC = Path(__file__).resolve().parent.parent / "static"
PAGE_HEADERS = {
    "Content-Security-Policy": "default-src 'self'; img-src 'self' blob: data:; frame-ancestors 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
}
CSV_COLUMNS = [f.name for f in fields(InspectionRecord)]


@router.get("/healthz", response_model=HealthOut)
async def healthz() -> HealthOut:
    """Liveness: the process answers (no token needed)."""
    return HealthOut(status="ok")


@router.get("/readyz", response_model=ReadyOut, responses={503: {"model": ReadyOut, "description": "no model yet"}})
async def readyz(state: State) -> JSONResponse:
    """Readiness: 200 once a part type has a model, 503 until then (no token needed)."""
    slots = state.parts.slots()
    if not slots:
        body = ReadyOut(ready=False, model_id=None, detail="no model loaded; PUT /v1/model uploads one")
        return JSONResponse(body.model_dump(), status_code=503)
    only = slots[0].current.detector.model_id if len(slots) == 1 else None
    body = ReadyOut(ready=True, model_id=only, part_types=[s.part_type for s in slots], detail="serving")
    return JSONResponse(body.model_dump())


def window(state: ServiceState, slot: ModelSlot, m: LoadedModel) -> np.ndarray:
    """The drift window of a part type's current model: the features of its latest inspections, from the store
    (every instance's, kept across restarts), oldest first."""
    rows = state.store.embeddings(
        part_type=slot.part_type, model_sha256=m.detector.sha256, limit=state.settings.drift_window
    )
    return np.stack([np.frombuffer(r, dtype=np.float32) for r in rows]) if rows else np.zeros((0, 0))


def assess(state: ServiceState, slot: ModelSlot, m: LoadedModel) -> DriftReport:
    s = state.settings
    return m.drift.assess(min_images=s.drift_min_images, sigmas=s.drift_sigmas, features=window(state, slot, m))


@router.get(
    "/metrics",
    response_class=PlainTextResponse,
    response_model=None,
    responses={
        200: {"content": {CONTENT_TYPE.split(";")[0]: {}}, "description": "Prometheus text format"},
        **problems.responses(401),
    },
)
def metrics(state: State, caller: StationCaller) -> PlainTextResponse:
    """Prometheus metrics by part type: requests, latency, verdicts, model and revision, scores, drift state."""
    served = []
    for slot in state.parts.slots():
        m = slot.current
        if m is None:
            continue
        det = m.detector
        # plain `def`: the assessment (a Fréchet distance) runs in the thread pool, not on the event loop
        served.append(
            Served(slot.part_type, det.model_id, det.sha256, det.revision, det.threshold, assess(state, slot, m))
        )
    return PlainTextResponse(state.metrics.render(served), media_type=CONTENT_TYPE)


def drift_out(state: ServiceState, slot: ModelSlot) -> DriftOut:
    m = slot.get()
    r = assess(state, slot, m)
    return DriftOut(
        status=r.status,
        drifting=r.drifting,
        detail=r.detail,
        part_type=slot.part_type,
        model_id=m.detector.model_id,
        images=r.images,
        needed=r.needed,
        n=r.n,
        distance=r.distance,
        reference_mean=r.reference_mean,
        reference_std=r.reference_std,
        limit=r.limit,
    )


@router.get("/v1/drift", response_model=DriftOut, responses=problems.responses(401, 409, 503))
def drift(state: State, caller: StationCaller) -> DriftOut:
    """Drift of the one part type served (see /v1/part-types/{name}/drift): recent images vs the training images."""
    return drift_out(state, state.parts.only())


def _cell(value):
    """Text a station sent (part id, station, operator) could start a spreadsheet formula: quote it as text."""
    if isinstance(value, str) and value[:1] in ("=", "+", "-", "@", "\t", "\r"):
        return "'" + value
    return value


def _csv_lines(state: ServiceState, viewer: Caller, since: str | None, until: str | None) -> Iterator[str]:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for record in state.store.iter_inspections(since=since, until=until):
        writer.writerow([_cell(shown_to(viewer, getattr(record, c))) for c in CSV_COLUMNS])
        if buf.tell() > 64 * 1024:
            yield buf.getvalue()
            buf.seek(0)
            buf.truncate()
    yield buf.getvalue()


@router.get(
    "/v1/export.csv",
    response_class=StreamingResponse,
    response_model=None,
    responses={
        200: {"content": {"text/csv": {}}, "description": "one row per inspection, oldest first"},
        **problems.responses(401, 422),
    },
)
def export_csv(state: State, caller: StationCaller, window: Window) -> StreamingResponse:
    """The audit rows of a time range as CSV: since <= time < until, both optional (UTC if no offset is given)."""
    lines = _csv_lines(state, caller, window.since, window.until)
    return StreamingResponse(
        lines,
        media_type="text/csv; charset=utf-8",
        headers={"Content-Disposition": 'attachment; filename="knowngood-inspections.csv"'},
    )


@router.get("/", response_class=HTMLResponse, response_model=None)
async def operator_page() -> FileResponse:
    """The operator page: inspect, watch, review flagged parts, see drift (the token is entered on the page)."""
    return FileResponse(STATIC / "index.html", media_type="text/html", headers=PAGE_HEADERS)


@router.get(
    "/heatmap-legend.png",
    response_class=Response,
    response_model=None,
    responses={200: {"content": {"image/png": {}}, "description": "a (1, 256) PNG, low anomaly left"}},
)
async def heatmap_legend() -> Response:
    """The overlays' colour scale for the operator page, low to high anomaly, on a mid-grey part (no token needed)."""
    return Response(legend_png(), media_type="image/png", headers={"Cache-Control": "public, max-age=86400"})
