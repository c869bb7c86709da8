"""Several instances, one truth: every instance polls what each part type serves (`served`, written with each
model event) and adopts what another instance changed: a swap, rollback or threshold change on one instance is
served by all within `sync_seconds` plus the time to ready a bundle it has not seen yet."""

from __future__ import annotations

import logging
import threading

from knowngood.service.part_types import PartTypes
from knowngood.service.restore import Models, _restored, with_section
from knowngood.service.store import Store

log = logging.getLogger("knowngood.service")


def follow_once(store: Store, parts: PartTypes, models: Models) -> list[str]:
    """Adopts every part type whose served state is newer than this instance's; returns their names."""
    changed = []
    for s in store.served():
        slot = parts.ensure(s.part_type)
        if s.event_seq <= slot.event_seq:
            continue
        current = models.load(s.current_sha256, f"followed: made current by model event {s.event_seq}")
        if current is None:
            log.warning("part type %s: bundle %s is not in the store; not followed", s.part_type, s.current_sha256)
            continue
        event = store.event(seq=s.event_seq)
        if event is not None and event.threshold_section is not None and event.model_sha256 == s.current_sha256:
            current = with_section(current, event.threshold_section)  # the event carries what it made current
        else:
            current = _restored(store, current, s.part_type)
        previous = _restored(store, models.load(s.previous_sha256, "followed: the rollback target"), s.part_type)
        if slot.adopt(current, previous, event_seq=s.event_seq):
            det = current.detector
            log.info(
                "part type %s now serves %s (revision %s), as model event %d says",
                s.part_type,
                det.model_id,
                det.revision,
                s.event_seq,
            )
            changed.append(s.part_type)
    return changed


class Follower:
    """A daemon thread running `follow_once` every `interval` seconds until `stop()`."""

    def __init__(self, store: Store, parts: PartTypes, models: Models, *, interval: float):
        self.store, self.parts, self.models, self.interval = store, parts, models, interval
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="knowngood-follow", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.wait(self.interval):
            try:
                follow_once(self.store, self.parts, self.models)
            except Exception:  # a database blip must not end following; the next poll tries again
                log.exception("following the models other instances serve")

    def stop(self) -> None:
        self._stop.set()
        if self._thread.is_alive():
            self._thread.join(timeout=10)
