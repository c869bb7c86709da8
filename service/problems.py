"""Errors as RFC 9457 problem details (`application/problem+json`: type, title, status, detail), in one place.

Domain errors from `training.errors` carry their own status and title; the service raises `Problem` for the
HTTP-level ones (401, 403, 404, 409, 413). Validation errors (422) list every offending field in `detail`.
"""

from __future__ import annotations

import json
import logging
import re
from http import HTTPStatus

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.openapi.utils import get_openapi
from fastapi.responses import JSONResponse
from knowngood.service.schemas import ProblemOut
from knowngood.training.errors import KnowngoodError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.types import ASGIApp, Message, Receive, Scope, Send

MEDIA_TYPE = "application/problem+json"
TYPE_PREFIX = "urn:knowngood:problem:"
PROBLEM_REF = "#/components/schemas/ProblemOut"
log = logging.getLogger("knowngood.service")


class Problem(StarletteHTTPException):
    """An HTTP-level error with a clear detail. A Starlette HTTPException so FastAPI re-raises it unchanged when
    it comes out of reading the request body (the upload-size limit)."""

    def __init__(self, status: int, detail: str, *, title: str | None = None, headers: dict[str, str] | None = None):
        super().__init__(status_code=status, detail=detail, headers=headers)
        self.title = title


def problem_response(
    status: int,
    detail: str,
    *,
    title: str | None = None,
    type_: str = "about:blank",
    headers: dict[str, str] | None = None,
    **extra,
) -> JSONResponse:
    body = {"type": type_, "title": title or HTTPStatus(status).phrase, "status": status, "detail": detail, **extra}
    return JSONResponse(body, status_code=status, media_type=MEDIA_TYPE, headers=headers)


def _slug(cls: type) -> str:
    return re.sub(r"(?<!^)(?=[A-Z])", "-", cls.__name__).lower()


async def _domain(request: Request, exc: KnowngoodError) -> JSONResponse:
    return problem_response(exc.http_status, str(exc), title=exc.title, type_=TYPE_PREFIX + _slug(type(exc)))


async def _http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
    detail = exc.detail if isinstance(exc.detail, str) else HTTPStatus(exc.status_code).description
    if exc.status_code == 404 and not isinstance(exc, Problem):
        detail = f"no route {request.url.path}; the API is under /v1 (see /docs)"
    if exc.status_code == 405:
        detail = f"{request.method} is not allowed on {request.url.path}"
    title = getattr(exc, "title", None)
    return problem_response(exc.status_code, detail, title=title, headers=getattr(exc, "headers", None))


def _where(loc: tuple) -> str:
    parts = [str(p) for p in loc if p not in ("body", "query", "path", "header")]
    return ".".join(parts) or "request"


async def _validation(request: Request, exc: RequestValidationError) -> JSONResponse:
    errors = [{"field": _where(tuple(e.get("loc", ()))), "message": e.get("msg", "invalid")} for e in exc.errors()]
    detail = "; ".join(f"{e['field']}: {e['message']}" for e in errors) or "the request is not valid"
    return problem_response(422, detail, title="Invalid request", type_=TYPE_PREFIX + "invalid-request", errors=errors)


class CrashGuard:
    """Turns an unexpected exception into a 500 problem with `Connection: close` (the connection's state is not to
    be trusted after it) and logs the traceback exactly once; the exception stops here, so the server does not log
    it a second time. (Starlette's own `Exception` handler answers and then re-raises.)"""

    def __init__(self, app: ASGIApp):
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def send_wrapper(message: Message) -> None:
            nonlocal started
            started = started or message["type"] == "http.response.start"
            await send(message)

        try:
            await self.app(scope, receive, send_wrapper)
        except Exception:
            log.exception("unexpected error on %s %s", scope["method"], scope["path"])
            if not started:  # else the server sees an unfinished response and closes the connection itself
                response = problem_response(
                    500,
                    "an unexpected error; the service logged it and keeps running",
                    headers={"Connection": "close"},
                )
                await response(scope, receive, send)


def install(app: FastAPI) -> None:
    """Registers the handlers and makes the OpenAPI document say `application/problem+json` for errors."""
    app.add_exception_handler(KnowngoodError, _domain)
    app.add_exception_handler(StarletteHTTPException, _http)
    app.add_exception_handler(RequestValidationError, _validation)
    app.openapi = lambda: _openapi(app)


def responses(*statuses: int) -> dict[int | str, dict]:
    """The `responses=` entry documenting these error statuses as problem details."""
    return {s: {"model": ProblemOut, "description": HTTPStatus(s).phrase} for s in statuses}


def _openapi(app: FastAPI) -> dict:
    if app.openapi_schema:
        return app.openapi_schema
    schema = get_openapi(title=app.title, version=app.version, description=app.description, routes=app.routes)
    for path in schema.get("paths", {}).values():
        for operation in path.values():
            if "requestBody" in operation and "400" not in operation["responses"]:
                # FastAPI answers 400 to any body it cannot parse (JSON that is not UTF-8, broken multipart)
                bad_body = {"description": "Bad Request", "content": {MEDIA_TYPE: {"schema": {"$ref": PROBLEM_REF}}}}
                operation["responses"] = dict(sorted({**operation["responses"], "400": bad_body}.items()))
            for response in operation.get("responses", {}).values():
                content = response.get("content", {})
                for media in list(content):
                    if content[media].get("schema", {}).get("$ref", "").endswith("/ProblemOut"):
                        content[MEDIA_TYPE] = content.pop(media)
    if "HTTPValidationError" not in json.dumps(schema.get("paths", {})):  # every route declares its 422 itself
        for unused in ("HTTPValidationError", "ValidationError"):
            schema.get("components", {}).get("schemas", {}).pop(unused, None)
    app.openapi_schema = schema
    return schema
