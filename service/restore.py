"""What a (re)start serves, and why. A model or threshold changed over the API survives a restart: the store keeps
what is served (`Serving`, written with each model event) and the data folder keeps the bundles. The command-line
bundle wins only when it is another bundle than at the last start (an engineer deliberately gave a new one); the
model it replaces then becomes the rollback target."""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from pathlib import Path

from knowngood.service.files import FileStore
from knowngood.service.model_slot import LoadedModel, ModelSlot, prepare
from knowngood.service.settings import Settings
from knowngood.service.store import SqliteStore
from knowngood.training.errors import BadBundle

log = logging.getLogger("knowngood.service")


@dataclass(frozen=True)
class Start:
    current: LoadedModel | None
    previous: LoadedModel | None
    startup_sha256: str | None  # the command-line bundle's
    why: str


def choose(store: SqliteStore, files: FileStore, settings: Settings) -> Start:
    """The models to serve at start, each with the threshold it was last served with. Raises BadBundle when the
    command-line bundle is bad: the service does not start half-configured."""
    saved = store.serving()
    cli = _command_line(files, settings)
    cli_sha = cli.detector.sha256 if cli else None

    def kept(sha: str | None, source: str) -> LoadedModel | None:
        if sha is None:
            return None
        if sha == cli_sha:
            return cli
        data = files.get_bundle(sha)
        if data is None:
            return None
        try:
            return prepare(data, name=f"kept bundle {sha[:12]}", settings=settings, source=source)
        except BadBundle as exc:  # e.g. refused by a stricter check of a newer version: say so, serve the rest
            log.warning("a kept bundle can no longer be served: %s", exc)
            return None

    if saved is None:
        why = "the command-line bundle (nothing was served with this audit store before)"
        return Start(_restored(store, cli), None, cli_sha, why if cli else "no model yet")
    if cli is not None and cli_sha not in (saved.startup_sha256, saved.current_sha256):
        previous = kept(saved.current_sha256, "restored: served before the restart")
        why = (
            f"the command-line bundle {settings.model_path} is another bundle than at the last start; it replaces "
            f"{saved.current_sha256[:12]}, which is now the rollback target"
        )
        return Start(_restored(store, cli), _restored(store, previous), cli_sha, why)
    current = kept(saved.current_sha256, "restored: served before the restart")
    previous = kept(saved.previous_sha256, "restored: the rollback target before the restart")
    startup = cli_sha or saved.startup_sha256
    if current is None:
        lost = f"the model served before the restart ({saved.current_sha256[:12]}) is no longer kept or valid"
        if cli is None:
            return Start(None, None, startup, f"{lost}; no model until PUT /v1/model")
        return Start(_restored(store, cli), None, startup, f"{lost}; serving the command-line bundle")
    last = store.latest_event(model_sha256=current.detector.sha256)
    how = f"made current by {last.kind} at {last.time} ({last.caller})" if last else "served before the restart"
    unchanged = "the command-line bundle is unchanged since the last start" if cli else "no command-line bundle"
    return Start(_restored(store, current), _restored(store, previous), startup, f"{how}; {unchanged}")


def _command_line(files: FileStore, settings: Settings) -> LoadedModel | None:
    if settings.model_path is None:
        return None
    path = Path(settings.model_path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise BadBundle(f"{path}: cannot read ({exc.strerror})") from None
    loaded = prepare(data, name=str(path), settings=settings, source=f"startup: {path}")
    files.put_bundle(loaded.detector.sha256, data)  # so a rollback to it survives a restart without the flag
    return loaded


def _restored(store: SqliteStore, loaded: LoadedModel | None) -> LoadedModel | None:
    """The threshold this very bundle (same sha256) was last served with, if a change over the API made it differ
    from the bundle's own: a restart must not quietly undo an engineer's threshold change, nor change the revision
    the verdicts since were given under."""
    if loaded is None:
        return None
    sha = loaded.detector.sha256
    last = store.latest_event(model_sha256=sha)
    if last is not None and last.threshold_section is not None:  # schema 3 on: the very section, so the revision
        section = json.loads(last.threshold_section)
        same = section == loaded.detector.manifest.get("threshold")
        return loaded if same else loaded.with_threshold_section(section)
    if last is None or last.threshold == loaded.detector.threshold:
        return loaded
    change = store.latest_event(model_sha256=sha, kind="threshold")  # who set it, when and why
    who = f"{change.operator} ({change.caller})" if change else last.caller
    return loaded.with_threshold(
        last.threshold,
        set_by=who,
        reason=change.reason if change else None,
        set_at=change.time if change else last.time,
    )


def keep_bundles(files: FileStore, slot: ModelSlot, *, keep: int) -> None:
    """Uploaded-bundle retention: the newest `keep` (KNOWNGOOD_KEEP_BUNDLES), plus whatever is served, may be
    rolled back to, or was given on the command line."""
    protect = {m.detector.sha256 for m in (slot.current, slot.previous) if m is not None}
    protect |= {slot.startup_sha256} if slot.startup_sha256 else set()
    for sha in files.prune_bundles(keep=keep, protect=protect):
        log.info("deleted kept bundle %s (retention: KNOWNGOOD_KEEP_BUNDLES=%d)", sha[:12], keep)
