"""The audit store's records: plain frozen dataclasses the queries read into and the service writes from."""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

from knowngood.service.store_tables import DEFAULT_PART_TYPE


def utc_now() -> str:
    """UTC ISO 8601 with microseconds: one fixed width, so text order is time order."""
    return to_iso(dt.datetime.now(dt.timezone.utc))


def to_iso(t: dt.datetime) -> str:
    """A naive time is taken as UTC."""
    t = t.replace(tzinfo=dt.timezone.utc) if t.tzinfo is None else t.astimezone(dt.timezone.utc)
    return t.isoformat(timespec="microseconds")


@dataclass(frozen=True)
class InspectionRecord:
    id: str
    time: str
    station: str | None
    part_id: str | None
    caller: str
    image_sha256: str
    image_width: int
    image_height: int
    model_id: str
    model_revision: str | None  # None on rows stored before revisions were recorded
    model_sha256: str
    score: float
    threshold: float
    verdict: str
    elapsed_ms: float
    files_kept: bool = True  # the heatmap (and the image, if kept) are still there: retention clears this
    part_type: str = DEFAULT_PART_TYPE
    image_kept: bool = False  # the uploaded file was kept (flagged parts by default, a share of passed ones)
    # the current label: the latest of the inspection's reviews (read from `reviews`, never stored on the row)
    review_label: str | None = None
    review_operator: str | None = None
    review_time: str | None = None
    review_defect_class: str | None = None
    review_note: str | None = None
    review_count: int = 0


@dataclass(frozen=True)
class StoredFiles:
    """What is kept with an inspection row, written in the same transaction: every instance reads it back."""

    heatmap: bytes  # `files.heatmap_bytes`: the map at working resolution and the model's view
    image: bytes | None = None  # the upload as sent, when kept
    embedding: bytes | None = None  # float32 critic features for the drift window


@dataclass(frozen=True)
class Review:
    """One operator's confirmation of a verdict; an inspection keeps all of them, the latest is its label."""

    inspection_id: str
    time: str
    label: str  # good, defective
    operator: str
    caller: str
    defect_class: str | None = None
    note: str | None = None


@dataclass(frozen=True)
class InspectionFilter:
    """Which inspections a list takes: a None field matches every row. since <= time < until (UTC ISO text);
    reviewed False = awaiting review."""

    verdict: str | None = None
    station: str | None = None
    part_id: str | None = None
    reviewed: bool | None = None
    since: str | None = None
    until: str | None = None
    part_type: str | None = None


@dataclass(frozen=True)
class ModelEvent:
    time: str
    kind: str  # load, swap, rollback, threshold
    model_id: str
    model_sha256: str
    threshold: float
    caller: str
    previous_threshold: float | None = None
    operator: str | None = None
    reason: str | None = None
    revision: str | None = None  # the model's revision once the event took effect (None: recorded before schema 3)
    threshold_section: str | None = None  # the manifest's threshold section (JSON) the revision is taken from
    part_type: str = DEFAULT_PART_TYPE
    seq: int | None = None  # set when read back: the order of events across every instance


@dataclass(frozen=True)
class Serving:
    """What one part type serves, kept with the model event that made it so: a restart, and every other instance
    on the database, serves the same."""

    current_sha256: str
    previous_sha256: str | None  # the rollback target
    startup_sha256: str | None  # the command-line bundle at the last start: a different one there replaces current
    part_type: str = DEFAULT_PART_TYPE
    event_seq: int = 0  # the model event that made it so (instances follow it)


EVERY = InspectionFilter()
