"""Bounded concurrency with a bounded queue: a stage (decoding, scoring) runs at most `slots` at once, at most
`queue` more may wait for it, and anyone beyond that is answered 503 with Retry-After at once, so memory and latency
stay bounded under any load instead of growing with the queue."""

from __future__ import annotations

import threading
from collections.abc import Iterator
from contextlib import contextmanager

from knowngood.service.problems import Problem

RETRY_AFTER_S = 1


class Stage:
    def __init__(self, name: str, *, slots: int, queue: int, on_refuse=None):
        self.name = name
        self.on_refuse = on_refuse  # called for each 503 (metrics)
        self.slots = slots
        self.queue = queue
        self._running = threading.BoundedSemaphore(slots)
        self._lock = threading.Lock()
        self._inside = 0  # running + waiting

    @contextmanager
    def enter(self) -> Iterator[None]:
        """Runs the block in one of the stage's slots, waiting if the queue has room; raises Problem(503) if not."""
        with self._lock:
            if self._inside >= self.slots + self.queue:
                if self.on_refuse is not None:
                    self.on_refuse()
                raise Problem(
                    503,
                    f"the service is busy: {self.slots} {self.name} running and {self.queue} waiting "
                    f"(KNOWNGOOD_MAX_DECODES, KNOWNGOOD_MAX_QUEUE); retry in {RETRY_AFTER_S} s",
                    title="Busy",
                    headers={"Retry-After": str(RETRY_AFTER_S)},
                )
            self._inside += 1
        try:
            with self._running:
                yield
        finally:
            with self._lock:
                self._inside -= 1

    @property
    def inside(self) -> int:
        return self._inside
