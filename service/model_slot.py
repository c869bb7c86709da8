"""The model being served, swapped atomically. A request takes the current `LoadedModel` once and uses it to the
end, so a swap never changes the model under a request in flight; the one before is kept for rollback."""

from __future__ import annotations

import dataclasses
import threading
from dataclasses import dataclass

import numpy as np

from service.drift import DriftMonitor
from service.problems import Problem
from service.settings import Settings
from service.store import ModelEvent, utc_now
from training import bundle
from training.detector import Detector
from training.errors import BadBundle, ModelNotReady


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
    )


class ModelSlot:
    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._current: LoadedModel | None = None
        self._previous: LoadedModel | None = None

    def get(self) -> LoadedModel:
        current = self._current  # one read: the request keeps this object whatever happens next
        if current is None:
            raise ModelNotReady("no model is loaded yet; an admin can upload one with PUT /v1/model")
        return current

    @property
    def current(self) -> LoadedModel | None:
        return self._current

    @property
    def previous(self) -> LoadedModel | None:
        return self._previous

    def install(self, new: LoadedModel, *, record=None) -> LoadedModel | None:
        """Makes `new` current; the model it replaces becomes the rollback target and is returned. `record(old, new)`
        runs first, under the lock: if it raises (the audit store refused the event), nothing changes."""
        with self._lock:
            old = self._current
            if record is not None:
                record(old, new)
            self._current = new
            if old is not None:
                self._previous = old
            return old

    def rollback(self, *, record=None) -> LoadedModel:
        """Swaps current and previous (so a second rollback undoes the first); returns the new current."""
        with self._lock:
            if self._previous is None or self._current is None:
                raise Problem(409, "there is no previous model to roll back to; PUT /v1/model keeps one")
            if record is not None:
                record(self._current, self._previous)
            self._current, self._previous = self._previous, self._current
            return self._current

    def update(self, change, *, record=None) -> LoadedModel:
        """Replaces the current model by `change(current)` (threshold edits); returns the new one."""
        with self._lock:
            old = self.get()
            new = change(old)
            if record is not None:
                record(old, new)
            self._current = new
            return new
