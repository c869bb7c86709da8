"""The FastAPI application: `create_app()` wires settings, middleware, error handlers and routes; the lifespan opens
the audit store and loads the model, so importing this module does no work."""

from __future__ import annotations

import logging
import re
from contextlib import asynccontextmanager

import torch
from fastapi import FastAPI
from fastapi.staticfiles import StaticFiles
from knowngood.service import docs, problems, restore
from knowngood.service.admission import Stage
from knowngood.service.deps import ServiceState, check_admin
from knowngood.service.files import FileStore
from knowngood.service.follow import Follower
from knowngood.service.limits import BodyGate
from knowngood.service.metrics import Metrics, MetricsMiddleware
from knowngood.service.model_slot import model_event
from knowngood.service.part_types import PartTypes
from knowngood.service.problems import CrashGuard
from knowngood.service.restore import Models
from knowngood.service.routes import inspections, ops
from knowngood.service.routes import model as model_routes
from knowngood.service.routes import part_types as part_type_routes
from knowngood.service.settings import Settings, get_settings
from knowngood.service.store import Store, describe
from knowngood.training import __version__
from knowngood.training.errors import KnowngoodError
from starlette.concurrency import run_in_threadpool

log = logging.getLogger("knowngood.service")
BUNDLE_ROUTE = re.compile(r"/v1/part-types/[^/]+/model")  # with PUT /v1/model: the routes that take a bundle
DESCRIPTION = """Visual inspection from known-good images. A part is **flagged** when its anomaly score (higher = less
like the known-good parts) is above the threshold, otherwise it **passes**. Send `Authorization: Bearer <token>`:
a station token may inspect, review and read; an admin token may also change the model and the threshold.
Errors are RFC 9457 problem details (`application/problem+json`).

A verdict is decision support; safety-critical parts still need the inspection that local codes and the customer's
quality standards require."""


def open_state(settings: Settings, metrics: Metrics) -> ServiceState:
    """Opens (and migrates) the audit store and serves, per part type, what `restore.choose` says (the model
    swapped in over the API before a restart, or the command-line bundle), logging which model and why. Raises
    BadBundle on a bad command-line bundle: the service does not start half-configured."""
    torch.set_num_threads(settings.torch_threads)
    store = Store(settings.store_url())
    log.info("audit store %s at schema revision %s", describe(settings.store_url()), store.revision)
    files = FileStore(store, legacy_root=settings.data_dir)
    models = Models(files, settings)
    state = ServiceState(
        settings=settings,
        store=store,
        files=files,
        parts=PartTypes(),
        models=models,
        metrics=metrics,
        tokens={ServiceState.token_key(t): c for t, c in settings.tokens().items()},
        decoding=Stage(
            "decodes",
            slots=settings.max_decodes,
            queue=settings.max_queue,
            on_refuse=lambda: metrics.observe_busy("decoding"),
        ),
        scoring=Stage(
            "scoring passes", slots=1, queue=settings.max_queue, on_refuse=lambda: metrics.observe_busy("scoring")
        ),
    )
    for start in restore.choose(store, models, settings):
        _serve(state, start)
    if not state.parts.slots():
        log.info("serving no model yet")
    restore.keep_bundles(store, files, state.parts, keep=settings.keep_bundles)
    return state


def _serve(state: ServiceState, start: restore.Start) -> None:
    slot = state.parts.ensure(start.part_type)
    slot.startup_sha256 = start.startup_sha256
    if start.current is None:
        log.info("part type %s: no model (%s)", start.part_type, start.why)
        return

    def record(old, new, serving):
        event = model_event("load", new, "startup", part_type=start.part_type, reason=start.why[:500])
        return state.store.add_model_event(event=event, serving=serving)

    slot.install(start.current, previous=start.previous, record=record)
    det = start.current.detector
    log.info(
        "part type %s: serving model %s (sha256 %s), threshold %.4g: %s",
        start.part_type,
        det.model_id,
        det.sha256[:12],
        det.threshold,
        start.why,
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
    follower = Follower(state.store, state.parts, state.models, interval=settings.sync_seconds)
    follower.start()
    try:
        yield
    finally:
        follower.stop()
        state.store.close()
        torch.set_num_threads(threads)


def create_app(settings: Settings | None = None) -> FastAPI:
    """The app. With `settings`, they replace `get_settings()` (the CLI passes the flags it parsed this way)."""
    app = FastAPI(
        title="knowngood",
        version=__version__,
        description=DESCRIPTION,
        lifespan=lifespan,
        docs_url=None,  # `docs.install` serves /docs from the installed package, never from a CDN
        redoc_url=None,  # ReDoc would load its script from a CDN: not offered
    )
    if settings is not None:
        app.dependency_overrides[get_settings] = lambda: settings
    app.state.metrics = Metrics()
    problems.install(app)
    for router in (inspections.router, model_routes.router, part_type_routes.router, ops.router):
        for route in router.routes:  # a route's one-line docstring is its OpenAPI summary
            route.summary = (route.endpoint.__doc__ or "").strip().splitlines()[0] or None
        app.include_router(router)
    app.mount("/static", StaticFiles(directory=ops.STATIC), name="static")
    docs.install(app)

    def body_limit(method: str, path: str, headers) -> int:  # requests arrive only after the lifespan set the state
        state: ServiceState = app.state.service
        path = path.rstrip("/")
        if method in ("GET", "HEAD", "OPTIONS") or not path.startswith("/v1/"):
            return state.settings.max_upload_bytes  # open routes and reads: nothing there reads a body
        caller = state.caller(headers.get("authorization"))  # 401 before a byte of the body is read
        if method == "PUT" and (path == "/v1/model" or BUNDLE_ROUTE.fullmatch(path)):
            check_admin(caller)  # 403 likewise: the bundle limit is for admins only
            return state.settings.max_bundle_bytes
        return state.settings.max_upload_bytes

    app.add_middleware(BodyGate, check=body_limit)
    app.add_middleware(CrashGuard)
    app.add_middleware(MetricsMiddleware, metrics=app.state.metrics)
    return app
