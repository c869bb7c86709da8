"""What a (re)start serves, and why, per part type. A model or threshold changed over the API survives a restart:
the store keeps what each part type serves (`Serving`, written with each model event) and the bundles. The
command-line bundle (for `--part-type`) wins only when it is another bundle than at the last start (an engineer
deliberately gave a new one); the model it replaces then becomes the rollback target."""

from __future__ import annotations

import json
import logging
import threading
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path

from knowngood.service.files import FileStore
from knowngood.service.model_slot import LoadedModel, prepare
from knowngood.service.part_types import PartTypes
from knowngood.service.settings import Settings
from knowngood.service.store import Store
from knowngood.training.errors import BadBundle

log = logging.getLogger("knowngood.service")


@dataclass(frozen=True)
class Start:
    part_type: str
    current: LoadedModel | None
    previous: LoadedModel | None
    startup_sha256: str | None  # the command-line bundle's
    why: str


class Models:
    """Bundles readied for serving, by sha256 (a few, most recently used): an instance that follows another's swap,
    or a rollback, does not validate and export the same bundle twice."""

    def __init__(self, files: FileStore, settings: Settings, *, size: int = 8):
        self.files, self.settings, self.size = files, settings, size
        self._ready: OrderedDict[str, LoadedModel] = OrderedDict()
        self._lock = threading.Lock()  # the follower thread and request threads share the cache

    def add(self, loaded: LoadedModel) -> LoadedModel:
        with self._lock:
            self._ready[loaded.detector.sha256] = loaded
            self._ready.move_to_end(loaded.detector.sha256)
            while len(self._ready) > self.size:
                self._ready.popitem(last=False)
        return loaded

    def load(self, sha: str | None, source: str) -> LoadedModel | None:
        """The bundle with this sha256 as the store keeps it, readied; None if it is not kept or no longer valid."""
        if sha is None:
            return None
        with self._lock:
            if sha in self._ready:
                self._ready.move_to_end(sha)
                return self._ready[sha]
        data = self.files.get_bundle(sha)
        if data is None:
            return None
        try:
            return self.add(prepare(data, name=f"kept bundle {sha[:12]}", settings=self.settings, source=source))
        except BadBundle as exc:  # e.g. refused by a stricter check of a newer version: say so, serve the rest
            log.warning("a kept bundle can no longer be served: %s", exc)
            return None


def choose(store: Store, models: Models, settings: Settings) -> list[Start]:
    """What each part type serves at start, each model with the threshold it was last served with. Raises
    BadBundle when the command-line bundle is bad: the service does not start half-configured."""
    cli = _command_line(models, settings)
    names = {s.part_type for s in store.served()} | ({settings.part_type} if cli else set())
    return [
        _choose_one(store, models, settings, name, cli if name == settings.part_type else None)
        for name in sorted(names)
    ]


def _choose_one(store: Store, models: Models, settings: Settings, name: str, cli: LoadedModel | None) -> Start:
    saved = store.serving(name)
    cli_sha = cli.detector.sha256 if cli else None

    def restored(loaded: LoadedModel | None) -> LoadedModel | None:
        return _restored(store, loaded, name)

    if saved is None:
        why = "the command-line bundle (nothing was served for this part type before)"
        return Start(name, restored(cli), None, cli_sha, why if cli else "no model yet")
    if cli is not None and cli_sha not in (saved.startup_sha256, saved.current_sha256):
        previous = models.load(saved.current_sha256, "restored: served before the restart")
        why = (
            f"the command-line bundle {settings.model_path} is another bundle than at the last start; it replaces "
            f"{saved.current_sha256[:12]}, which is now the rollback target"
        )
        return Start(name, restored(cli), restored(previous), cli_sha, why)
    current = models.load(saved.current_sha256, "restored: served before the restart")
    previous = models.load(saved.previous_sha256, "restored: the rollback target before the restart")
    startup = cli_sha or saved.startup_sha256
    if current is None:
        lost = f"the model served before the restart ({saved.current_sha256[:12]}) is no longer kept or valid"
        if cli is None:
            return Start(name, None, None, startup, f"{lost}; no model until an admin uploads one")
        return Start(name, restored(cli), None, startup, f"{lost}; serving the command-line bundle")
    last = store.latest_event(model_sha256=current.detector.sha256, part_type=name)
    how = f"made current by {last.kind} at {last.time} ({last.caller})" if last else "served before the restart"
    unchanged = "the command-line bundle is unchanged since the last start" if cli else "no command-line bundle"
    return Start(name, restored(current), restored(previous), startup, f"{how}; {unchanged}")


def _command_line(models: Models, settings: Settings) -> LoadedModel | None:
    if settings.model_path is None:
        return None
    path = Path(settings.model_path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise BadBundle(f"{path}: cannot read ({exc.strerror})") from None
    loaded = prepare(data, name=str(path), settings=settings, source=f"startup: {path}")
    models.files.put_bundle(loaded.detector.sha256, data)  # so a rollback to it survives a restart without the flag
    return models.add(loaded)


def _restored(store: Store, loaded: LoadedModel | None, part_type: str) -> LoadedModel | None:
    """The threshold this very bundle (same sha256) was last served with for this part type, if a change over the
    API made it differ from the bundle's own: a restart must not quietly undo an engineer's threshold change, nor
    change the revision the verdicts since were given under."""
    if loaded is None:
        return None
    sha = loaded.detector.sha256
    last = store.latest_event(model_sha256=sha, part_type=part_type)
    if last is not None and last.threshold_section is not None:  # schema 3 on: the very section, so the revision
        return with_section(loaded, last.threshold_section)
    if last is None or last.threshold == loaded.detector.threshold:
        return loaded
    change = store.latest_event(model_sha256=sha, part_type=part_type, kind="threshold")  # who set it, when, why
    who = f"{change.operator} ({change.caller})" if change else last.caller
    return loaded.with_threshold(
        last.threshold,
        set_by=who,
        reason=change.reason if change else None,
        set_at=change.time if change else last.time,
    )


def with_section(loaded: LoadedModel, threshold_section: str) -> LoadedModel:
    """The model served with the manifest threshold section a model event recorded (same value, same revision)."""
    section = json.loads(threshold_section)
    same = section == loaded.detector.manifest.get("threshold")
    return loaded if same else loaded.with_threshold_section(section)


def keep_bundles(store: Store, files: FileStore, parts: PartTypes, *, keep: int) -> None:
    """Bundle retention: the newest `keep` (KNOWNGOOD_KEEP_BUNDLES), plus whatever any part type on any instance
    serves, may roll back to, or was given on a command line."""
    protect = set()
    for s in store.served():
        protect |= {s.current_sha256, s.previous_sha256, s.startup_sha256}
    for slot in parts.slots():
        protect |= {m.detector.sha256 for m in (slot.current, slot.previous) if m is not None}
        protect |= {slot.startup_sha256}
    for sha in files.prune_bundles(keep=keep, protect=protect - {None}):
        log.info("deleted kept bundle %s (retention: KNOWNGOOD_KEEP_BUNDLES=%d)", sha[:12], keep)
