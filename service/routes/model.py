"""The model being served: read it, replace it with an uploaded bundle, roll back, change the threshold."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, File, Form, Query, UploadFile
from knowngood.service import problems
from knowngood.service.deps import AdminCaller, CurrentModel, ServiceState, State, StationCaller
from knowngood.service.model_slot import LoadedModel, model_event, prepare
from knowngood.service.restore import keep_bundles
from knowngood.service.schemas import (
    NO_CONTROL,
    REASON_HELP,
    ChangeIn,
    ModelEventList,
    ModelEventOut,
    ModelOut,
    ModelRef,
    ThresholdIn,
    ThresholdInfo,
)
from knowngood.service.settings import Caller, shown_to

router = APIRouter(prefix="/v1/model", tags=["model"])
Operator = Annotated[str, Form(min_length=1, max_length=100, pattern=NO_CONTROL, description="who makes the change")]
Reason = Annotated[str, Form(min_length=1, max_length=500, pattern=NO_CONTROL, description=REASON_HELP)]


def ref(m: LoadedModel) -> ModelRef:
    return ModelRef(id=m.detector.model_id, revision=m.detector.revision, sha256=m.detector.sha256)


def model_out(m: LoadedModel, previous: LoadedModel | None, viewer: Caller) -> ModelOut:
    det = m.detector
    t = shown_to(viewer, det.manifest.get("threshold", {}))
    return ModelOut(
        id=det.model_id,
        revision=det.revision,
        sha256=det.sha256,
        size=det.cfg.size,
        channels=det.cfg.channels,
        runtime=m.runtime,
        threshold=ThresholdInfo(
            value=det.threshold, method=t.get("method"), set_by=t.get("set_by"), set_at=t.get("set_at")
        ),
        loaded_at=m.loaded_at,
        source=m.source,
        manifest={**det.manifest, "threshold": t},
        previous=ref(previous) if previous else None,
    )


def _respond(viewer: Caller):
    """The slot's `respond`: the response is built before the change is recorded or made (all-or-nothing)."""
    return lambda new, previous: model_out(new, previous, viewer)


def _log(state: ServiceState, kind: str, caller: Caller, **extra):
    """A `record` callback for the slot: the event and what is served are in the audit store before the swap."""
    return lambda old, new, serving: state.store.add_model_event(
        event=model_event(kind, new, caller.name, **extra), serving=serving
    )


@router.get("", response_model=ModelOut, responses=problems.responses(401, 503))
async def get_model(state: State, caller: StationCaller, model: CurrentModel) -> ModelOut:
    """The model being served: ids, threshold and how it was set, manifest, and what rollback would restore."""
    return model_out(model, state.slot.previous, caller)


@router.get("/events", response_model=ModelEventList, responses=problems.responses(401, 422))
def list_model_events(
    state: State, caller: StationCaller, limit: Annotated[int, Query(ge=1, le=1000)] = 50
) -> ModelEventList:
    """Model loads, swaps, rollbacks and threshold changes, newest first, with who, when, why and the revision."""
    events = state.store.model_events(limit=limit)
    return ModelEventList(
        items=[
            ModelEventOut(
                time=e.time,
                kind=e.kind,
                model=ModelRef(id=e.model_id, revision=e.revision, sha256=e.model_sha256),
                threshold=e.threshold,
                previous_threshold=e.previous_threshold,
                caller=shown_to(caller, e.caller),
                operator=e.operator,
                reason=shown_to(caller, e.reason),
            )
            for e in events
        ]
    )


@router.put("", response_model=ModelOut, responses=problems.responses(400, 401, 403, 413, 422))
def put_model(
    state: State,
    caller: AdminCaller,
    bundle: Annotated[UploadFile, File(description="a model bundle written by `knowngood train`")],
    operator: Operator,
    reason: Reason,
) -> ModelOut:
    """Replace the model: the bundle is validated completely, then swapped in atomically; the old one is kept."""
    data = bundle.file.read()
    new = prepare(
        data, name=f"uploaded bundle {(bundle.filename or '')[:80]!r}", settings=state.settings, source="upload"
    )
    state.files.put_bundle(new.detector.sha256, data)  # before the swap: a restart can serve it again
    # requests that already hold the old model finish on it
    record = _log(state, "swap", caller, operator=operator, reason=reason)
    out = state.slot.install(new, record=record, respond=_respond(caller))
    keep_bundles(state.files, state.slot, keep=state.settings.keep_bundles)
    return out


@router.post("/rollback", response_model=ModelOut, responses=problems.responses(401, 403, 409, 422))
def rollback_model(state: State, caller: AdminCaller, change: ChangeIn) -> ModelOut:
    """Swap back to the previous model (a second rollback undoes the first), recorded with who and why."""
    record = _log(state, "rollback", caller, operator=change.operator, reason=change.reason)
    return state.slot.rollback(record=record, respond=_respond(caller))


@router.put("/threshold", response_model=ModelOut, responses=problems.responses(401, 403, 422, 503))
def put_threshold(state: State, caller: AdminCaller, change: ThresholdIn) -> ModelOut:
    """Set the current model's threshold (flag when score > threshold): a new revision, recorded with who and why."""
    set_by = f"{change.operator} ({caller.name})"

    def record(old: LoadedModel, new: LoadedModel, serving) -> None:
        event = model_event(
            "threshold",
            new,
            caller.name,
            previous=old.detector.threshold,
            operator=change.operator,
            reason=change.reason,
        )
        state.store.add_model_event(event=event, serving=serving)

    return state.slot.update(
        lambda m: m.with_threshold(change.threshold, set_by=set_by, reason=change.reason),
        record=record,
        respond=_respond(caller),
    )
