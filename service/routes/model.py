"""A part type's model: read it, replace it with an uploaded bundle, roll back, change the threshold, list its
events. The functions here take the part type's slot; `routes/part_types.py` serves them per part type, and the
`/v1/model` routes below are aliases for the part type served when there is only one."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, File, Form, Query, UploadFile
from knowngood.service import problems
from knowngood.service.deps import AdminCaller, ServiceState, State, StationCaller
from knowngood.service.model_slot import LoadedModel, ModelSlot, model_event, prepare
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
Bundle = Annotated[UploadFile, File(description="a model bundle written by `knowngood train`")]
Limit = Annotated[int, Query(ge=1, le=1000)]


def ref(m: LoadedModel) -> ModelRef:
    return ModelRef(id=m.detector.model_id, revision=m.detector.revision, sha256=m.detector.sha256)


def model_out(part_type: str, m: LoadedModel, previous: LoadedModel | None, viewer: Caller) -> ModelOut:
    det = m.detector
    t = shown_to(viewer, det.manifest.get("threshold", {}))
    return ModelOut(
        part_type=part_type,
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


def _respond(slot: ModelSlot, viewer: Caller):
    """The slot's `respond`: the response is built before the change is recorded or made (all-or-nothing)."""
    return lambda new, previous: model_out(slot.part_type, new, previous, viewer)


def _log(state: ServiceState, slot: ModelSlot, kind: str, caller: Caller, **extra):
    """A `record` callback for the slot: the event and what is served are in the audit store before the swap."""
    return lambda old, new, serving: state.store.add_model_event(
        event=model_event(kind, new, caller.name, part_type=slot.part_type, **extra), serving=serving
    )


def read_model(slot: ModelSlot, caller: Caller) -> ModelOut:
    return model_out(slot.part_type, slot.get(), slot.previous, caller)


def list_events(state: ServiceState, caller: Caller, part_type: str | None, limit: int) -> ModelEventList:
    events = state.store.model_events(limit=limit, part_type=part_type)
    return ModelEventList(
        items=[
            ModelEventOut(
                time=e.time,
                part_type=e.part_type,
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


def swap(state: ServiceState, slot: ModelSlot, caller: Caller, bundle: UploadFile, operator: str, reason: str):
    data = bundle.file.read()
    new = prepare(
        data, name=f"uploaded bundle {(bundle.filename or '')[:80]!r}", settings=state.settings, source="upload"
    )
    state.files.put_bundle(new.detector.sha256, data)  # before the swap: every instance, and a restart, can load it
    state.models.add(new)
    # requests that already hold the old model finish on it
    record = _log(state, slot, "swap", caller, operator=operator, reason=reason)
    out = slot.install(new, record=record, respond=_respond(slot, caller))
    keep_bundles(state.store, state.files, state.parts, keep=state.settings.keep_bundles)
    return out


def rollback(state: ServiceState, slot: ModelSlot, caller: Caller, change: ChangeIn) -> ModelOut:
    record = _log(state, slot, "rollback", caller, operator=change.operator, reason=change.reason)
    return slot.rollback(record=record, respond=_respond(slot, caller))


def set_threshold(state: ServiceState, slot: ModelSlot, caller: Caller, change: ThresholdIn) -> ModelOut:
    set_by = f"{change.operator} ({caller.name})"

    def record(old: LoadedModel, new: LoadedModel, serving) -> int:
        event = model_event(
            "threshold",
            new,
            caller.name,
            part_type=slot.part_type,
            previous=old.detector.threshold,
            operator=change.operator,
            reason=change.reason,
        )
        return state.store.add_model_event(event=event, serving=serving)

    return slot.update(
        lambda m: m.with_threshold(change.threshold, set_by=set_by, reason=change.reason),
        record=record,
        respond=_respond(slot, caller),
    )


# ---- /v1/model: aliases for the one part type served ------------------------------------------------------------


@router.get("", response_model=ModelOut, responses=problems.responses(401, 409, 503))
def get_model(state: State, caller: StationCaller) -> ModelOut:
    """The model being served (one part type): ids, threshold and how it was set, manifest, rollback target."""
    return read_model(state.parts.only(), caller)


@router.get("/events", response_model=ModelEventList, responses=problems.responses(401, 422))
def list_model_events(state: State, caller: StationCaller, limit: Limit = 50) -> ModelEventList:
    """Model loads, swaps, rollbacks and threshold changes of every part type, newest first, with who and why."""
    return list_events(state, caller, None, limit)


@router.put("", response_model=ModelOut, responses=problems.responses(400, 401, 403, 409, 413, 422))
def put_model(state: State, caller: AdminCaller, bundle: Bundle, operator: Operator, reason: Reason) -> ModelOut:
    """Replace the model (one part type; the first upload creates KNOWNGOOD_PART_TYPE): validated, then swapped."""
    slot = state.parts.only() if state.parts.slots() else state.parts.ensure(state.settings.part_type)
    return swap(state, slot, caller, bundle, operator, reason)


@router.post("/rollback", response_model=ModelOut, responses=problems.responses(401, 403, 409, 422, 503))
def rollback_model(state: State, caller: AdminCaller, change: ChangeIn) -> ModelOut:
    """Swap back to the previous model (one part type; a second rollback undoes the first), with who and why."""
    return rollback(state, state.parts.only(), caller, change)


@router.put("/threshold", response_model=ModelOut, responses=problems.responses(401, 403, 409, 422, 503))
def put_threshold(state: State, caller: AdminCaller, change: ThresholdIn) -> ModelOut:
    """Set the threshold (one part type; flag when score > threshold): a new revision, recorded with who and why."""
    return set_threshold(state, state.parts.only(), caller, change)
