"""The model being served, swapped atomically. A request takes the current `LoadedModel` once and uses it to the
end, so a swap never changes the model under a request in flight; the one before is kept for rollback."""

from __future__ import annotations

import dataclasses
import json
import threading
from dataclasses import dataclass

import numpy as np
from knowngood.service.drift import DriftMonitor
from knowngood.service.problems import Problem
from knowngood.service.settings import Settings
from knowngood.service.store import ModelEvent, Serving, utc_now
from knowngood.training import bundle
from knowngood.training.detector import Detector
from knowngood.training.errors import BadBundle, ModelNotReady


@dataclass(frozen=True)
class LoadedModel:
    detector: Detector
    frechet: dict[str, np.ndarray]
    drift: DriftMonitor
    loaded_at: str
    source: str  # "startup: <path>", "upload", ...

    @property
    def runtime(self) -> str:
        return "torch" if self.detector.runner is None else "onnx"

    def with_threshold(
        self, value: float, *, set_by: str, reason: str | None, set_at: str | None = None
    ) -> LoadedModel:
        """The same model (weights, drift window) with a new threshold, recorded in its manifest."""
        manifest = dict(self.detector.manifest)
        previous = manifest.get("threshold", {})
        manifest["threshold"] = {
            "value": float(value),
            "method": "manual",
            "set_by": set_by,
            "set_at": set_at or utc_now(),
            "reason": reason,
            "replaced": {k: v for k, v in previous.items() if k != "replaced"},
        }
        det = dataclasses.replace(self.detector, threshold=float(value), manifest=manifest)
        return dataclasses.replace(self, detector=det)

    def with_threshold_section(self, section: dict) -> LoadedModel:
        """The same model served with this manifest threshold section, as a model event recorded it: the same
        value, the same who/when/why, so the same revision."""
        manifest = {**self.detector.manifest, "threshold": section}
        det = dataclasses.replace(self.detector, threshold=float(section["value"]), manifest=manifest)
        return dataclasses.replace(self, detector=det)


def prepare(data: bytes, *, name: str, settings: Settings, source: str) -> LoadedModel:
    """Validates a bundle completely (`training.bundle.from_bytes`: zip, manifest, format, shapes, a test forward
    pass) and readies it for serving; raises BadBundle and changes nothing on any problem."""
    detector, frechet = bundle.from_bytes(data, name=name)
    if settings.onnx:
        try:
            detector.use_onnx(threads=settings.torch_threads)
        except Exception as exc:  # the exporter and runtime raise many types; all mean this bundle cannot serve
            raise BadBundle(
                f"{name}: the model cannot run under ONNX Runtime ({exc}); set KNOWNGOOD_ONNX=false "
                "to serve it with PyTorch"
            ) from None
    return LoadedModel(
        detector=detector,
        frechet=frechet,
        drift=DriftMonitor(frechet, window=settings.drift_window),
        loaded_at=utc_now(),
        source=source,
    )


def model_event(
    kind: str,
    m: LoadedModel,
    caller: str,
    *,
    part_type: str,
    previous: float | None = None,
    operator: str | None = None,
    reason: str | None = None,
) -> ModelEvent:
    """The audit-store row for a load, swap, rollback or threshold change that makes `m` current."""
    det = m.detector
    return ModelEvent(
        time=utc_now(),
        kind=kind,
        model_id=det.model_id,
        model_sha256=det.sha256,
        threshold=det.threshold,
        previous_threshold=previous,
        caller=caller,
        operator=operator,
        reason=reason,
        revision=det.revision,
        threshold_section=json.dumps(det.manifest.get("threshold", {}), sort_keys=True),
        part_type=part_type,
    )


class ModelSlot:
    """One part type's current model and rollback target. Every change computes the `Serving` it leads to, builds
    the response with `respond(new, previous)` and records the event with `record(old, new, serving)` (which returns
    the event's seq), all under one lock and before anything changes: if either raises, the service serves what it
    served (all-or-nothing). Changes other instances made arrive through `adopt`."""

    def __init__(self, part_type: str, *, startup_sha256: str | None = None) -> None:
        self.part_type = part_type
        self._lock = threading.Lock()
        self._current: LoadedModel | None = None
        self._previous: LoadedModel | None = None
        self.startup_sha256 = startup_sha256  # the command-line bundle of this start (kept in `Serving`)
        self.event_seq = 0  # the model event whose state this slot serves (instances converge on the newest)

    def get(self) -> LoadedModel:
        current = self._current  # one read: the request keeps this object whatever happens next
        if current is None:
            raise ModelNotReady(
                f"part type {self.part_type!r} has no model yet; an admin can upload one with "
                f"PUT /v1/part-types/{self.part_type}/model"
            )
        return current

    @property
    def current(self) -> LoadedModel | None:
        return self._current

    @property
    def previous(self) -> LoadedModel | None:
        return self._previous

    def _change(self, old, new: LoadedModel, previous: LoadedModel | None, record, respond):
        result = respond(new, previous) if respond is not None else new
        if record is not None:
            serving = Serving(
                current_sha256=new.detector.sha256,
                previous_sha256=previous.detector.sha256 if previous else None,
                startup_sha256=self.startup_sha256,
                part_type=self.part_type,
            )
            self.event_seq = max(self.event_seq, record(old, new, serving) or 0)
        self._current, self._previous = new, previous
        return result

    def adopt(self, current: LoadedModel, previous: LoadedModel | None, *, event_seq: int) -> bool:
        """Serves what another instance made current (event `event_seq`), unless this slot already serves that
        event or a newer one; nothing is recorded (the other instance did). True if it changed anything."""
        with self._lock:
            if event_seq <= self.event_seq:
                return False
            self._current, self._previous, self.event_seq = current, previous, event_seq
            return True

    def install(self, new: LoadedModel, *, record=None, respond=None, previous: LoadedModel | None = None):
        """Makes `new` current; the model it replaces (or, at start, `previous`) becomes the rollback target."""
        with self._lock:
            old = self._current
            return self._change(old, new, old or previous or self._previous, record, respond)

    def rollback(self, *, record=None, respond=None):
        """Swaps current and previous (so a second rollback undoes the first)."""
        with self._lock:
            if self._previous is None or self._current is None:
                raise Problem(
                    409,
                    f"part type {self.part_type!r} has no previous model to roll back to; a swap keeps one",
                )
            return self._change(self._current, self._previous, self._current, record, respond)

    def update(self, change, *, record=None, respond=None):
        """Replaces the current model by `change(current)` (threshold edits)."""
        with self._lock:
            old = self.get()
            return self._change(old, change(old), self._previous, record, respond)
