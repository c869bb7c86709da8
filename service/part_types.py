"""The part types a service serves, each with its own model slot (model, threshold, rollback target, drift window).
A service with exactly one part type answers for it when a request names none, so single-model use and the
`/v1/model` routes keep working unchanged."""

from __future__ import annotations

import threading

from knowngood.service.model_slot import ModelSlot
from knowngood.service.problems import Problem
from knowngood.training.errors import ModelNotReady


class PartTypes:
    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._slots: dict[str, ModelSlot] = {}

    def ensure(self, name: str) -> ModelSlot:
        """The slot of `name`, created (empty) if there is none yet."""
        with self._lock:
            slot = self._slots.get(name)
            if slot is None:
                slot = self._slots[name] = ModelSlot(name)
            return slot

    def slots(self) -> list[ModelSlot]:
        """Every part type with a model, by name."""
        with self._lock:
            found = [s for s in self._slots.values() if s.current is not None]
        return sorted(found, key=lambda s: s.part_type)

    def names(self) -> list[str]:
        return [s.part_type for s in self.slots()]

    def find(self, name: str) -> ModelSlot:
        """The slot of a part type that has a model; 404 naming those served otherwise."""
        with self._lock:
            slot = self._slots.get(name)
        if slot is None or slot.current is None:
            raise Problem(404, f"no part type {name[:64]!r} is served; served: {self._listed()}")
        return slot

    def resolve(self, name: str | None) -> ModelSlot:
        """The part type an inspection names, or the only one served when it names none."""
        if name is not None:
            return self.find(name)
        return self.only(what="an inspection that names no part_type")

    def only(self, *, what: str = "this route") -> ModelSlot:
        """The one part type served (for requests that name none); 409 when there are several, 503 when none."""
        slots = self.slots()
        if len(slots) == 1:
            return slots[0]
        if not slots:
            raise ModelNotReady(
                "no model is loaded yet; an admin can upload one with PUT /v1/model or PUT /v1/part-types/{name}/model"
            )
        raise Problem(409, f"{what} is ambiguous: several part types are served ({self._listed()}); name one")

    def _listed(self) -> str:
        return ", ".join(self.names()) or "none yet"
