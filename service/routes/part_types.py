"""Part types: each has its own model, threshold, threshold history, rollback target and drift window. An admin
swaps, tunes or rolls back one part type without touching the others; the first bundle put for a new name creates
that part type."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path
from knowngood.service import problems
from knowngood.service.deps import AdminCaller, State, StationCaller
from knowngood.service.routes.model import Bundle, Limit, Operator, Reason, list_events, read_model, ref, rollback
from knowngood.service.routes.model import set_threshold as _set_threshold
from knowngood.service.routes.model import swap as _swap
from knowngood.service.routes.ops import drift_out
from knowngood.service.schemas import (
    ChangeIn,
    DriftOut,
    ModelEventList,
    ModelOut,
    PartTypeList,
    PartTypeOut,
    ThresholdIn,
)
from knowngood.service.settings import PART_TYPE

router = APIRouter(prefix="/v1/part-types", tags=["part types"])
Name = Annotated[str, Path(pattern=PART_TYPE, max_length=64, description="the part type's name")]


@router.get("", response_model=PartTypeList, responses=problems.responses(401))
def list_part_types(state: State, caller: StationCaller) -> PartTypeList:
    """The part types served, with each one's model, threshold and rollback target."""
    items = []
    for slot in state.parts.slots():
        m, previous = slot.current, slot.previous
        if m is not None:
            items.append(
                PartTypeOut(
                    name=slot.part_type,
                    model=ref(m),
                    threshold=m.detector.threshold,
                    previous=ref(previous) if previous else None,
                )
            )
    return PartTypeList(items=items, count=len(items))


@router.get("/{name}/model", response_model=ModelOut, responses=problems.responses(401, 404, 422))
def get_part_type_model(state: State, caller: StationCaller, name: Name) -> ModelOut:
    """A part type's model: ids, threshold and how it was set, manifest, and what rollback would restore."""
    return read_model(state.parts.find(name), caller)


@router.put("/{name}/model", response_model=ModelOut, responses=problems.responses(400, 401, 403, 413, 422))
def put_part_type_model(
    state: State, caller: AdminCaller, name: Name, bundle: Bundle, operator: Operator, reason: Reason
) -> ModelOut:
    """Replace a part type's model, or create the part type: the bundle is validated, then swapped in atomically."""
    return _swap(state, state.parts.ensure(name), caller, bundle, operator, reason)


@router.post("/{name}/model/rollback", response_model=ModelOut, responses=problems.responses(401, 403, 404, 409, 422))
def rollback_part_type(state: State, caller: AdminCaller, name: Name, change: ChangeIn) -> ModelOut:
    """Swap a part type back to its previous model (a second rollback undoes the first), with who and why."""
    return rollback(state, state.parts.find(name), caller, change)


@router.put("/{name}/threshold", response_model=ModelOut, responses=problems.responses(401, 403, 404, 422))
def put_part_type_threshold(state: State, caller: AdminCaller, name: Name, change: ThresholdIn) -> ModelOut:
    """Set a part type's threshold (flag when score > threshold): a new revision, recorded with who and why."""
    return _set_threshold(state, state.parts.find(name), caller, change)


@router.get("/{name}/events", response_model=ModelEventList, responses=problems.responses(401, 422))
def list_part_type_events(state: State, caller: StationCaller, name: Name, limit: Limit = 50) -> ModelEventList:
    """A part type's model loads, swaps, rollbacks and threshold changes, newest first: its threshold history."""
    return list_events(state, caller, name, limit)


@router.get("/{name}/drift", response_model=DriftOut, responses=problems.responses(401, 404, 422))
def part_type_drift(state: State, caller: StationCaller, name: Name) -> DriftOut:
    """A part type's drift: its recent images (every instance's) against its model's training images."""
    return drift_out(state, state.parts.find(name))
