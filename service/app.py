"""The FastAPI application: `create_app()` wires settings, middleware, error handlers and routes; the lifespan opens
the audit store and loads the model, so importing this module does no work."""

from __future__ import annotations

import logging
from contextlib import asynccontextmanager
from pathlib import Path

import torch
from fastapi import FastAPI
from fastapi.staticfiles import StaticFiles
from starlette.concurrency import run_in_threadpool

from service import problems
from service.deps import ServiceState
from service.files import FileStore
from service.limits import BodyLimitMiddleware
from service.metrics import Metrics, MetricsMiddleware
from service.model_slot import LoadedModel, ModelSlot, model_event, prepare
from service.routes import inspections, ops
from service.routes import model as model_routes
from service.settings import Settings, get_settings
from service.store import SqliteStore
from training import __version__
from training.errors import KnowngoodError

log = logging.getLogger("knowngood.service")
DESCRIPTION = """Visual inspection from known-good images. A part is **flagged** when its anomaly score (higher = less
like the known-good parts) is above the threshold, otherwise it **passes**. Send `Authorization: Bearer <token>`:
a station token may inspect, review and read; an admin token may also change the model and the threshold.
Errors are RFC 9457 problem details (`application/problem+json`).

A verdict is decision support; safety-critical parts still need the inspection that local codes and the customer's
quality standards require."""


def open_state(settings: Settings, metrics: Metrics) -> ServiceState:
    """Opens the store and files, loads the startup model (re-applying a threshold set over the API for this very
    bundle), and logs the load. Raises BadBundle on a bad model file: the service does not start half-configured."""
    torch.set_num_threads(settings.torch_threads)
    store = SqliteStore(settings.db)
    state = ServiceState(
        settings=settings,
        store=store,
        files=FileStore(settings.data_dir, keep_images=settings.keep_images),
        slot=ModelSlot(),
        metrics=metrics,
        tokens={ServiceState.token_key(t): c for t, c in settings.tokens().items()},
    )
    if settings.model_path is not None:
        path = Path(settings.model_path)
        loaded = _restore_threshold(
            store, prepare(path.read_bytes(), name=str(path), settings=settings, source=f"startup: {path}")
        )
        state.slot.install(loaded, record=lambda old, m: store.add_model_event(event=model_event("load", m, "startup")))
        log.info("serving model %s (%s), threshold %.4g", loaded.detector.model_id, path, loaded.detector.threshold)
    return state


def _restore_threshold(store: SqliteStore, loaded: LoadedModel) -> LoadedModel:
    """The threshold this very bundle (same sha256) was last served with, if a change over the API made it differ
    from the bundle's own: a restart must not quietly undo an engineer's threshold change."""
    sha = loaded.detector.sha256
    last = store.latest_event(model_sha256=sha)
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


@asynccontextmanager
async def lifespan(app: FastAPI):
    settings = app.dependency_overrides.get(get_settings, get_settings)()
    threads = torch.get_num_threads()  # open_state sets the service's; restored at shutdown (tests share a process)
    try:
        state = await run_in_threadpool(open_state, settings, app.state.metrics)
    except KnowngoodError as exc:
        app.state.startup_error = exc  # the CLI repeats it as the last line, under uvicorn's traceback
        raise
    app.state.service = state
    try:
        yield
    finally:
        state.store.close()
        torch.set_num_threads(threads)


def create_app(settings: Settings | None = None) -> FastAPI:
    """The app. With `settings`, they replace `get_settings()` (the CLI passes the flags it parsed this way)."""
    app = FastAPI(title="knowngood", version=__version__, description=DESCRIPTION, lifespan=lifespan)
    if settings is not None:
        app.dependency_overrides[get_settings] = lambda: settings
    app.state.metrics = Metrics()
    problems.install(app)
    for router in (inspections.router, model_routes.router, ops.router):
        for route in router.routes:  # a route's one-line docstring is its OpenAPI summary
            route.summary = (route.endpoint.__doc__ or "").strip().splitlines()[0] or None
        app.include_router(router)
    app.mount("/static", StaticFiles(directory=ops.STATIC), name="static")

    def limit_for(method: str, path: str) -> int:  # requests arrive only after the lifespan set up the state
        s = app.state.service.settings
        return s.max_bundle_bytes if (method, path.rstrip("/")) == ("PUT", "/v1/model") else s.max_upload_bytes

    app.add_middleware(BodyLimitMiddleware, limit_for=limit_for)
    app.add_middleware(MetricsMiddleware, metrics=app.state.metrics)
    return app
