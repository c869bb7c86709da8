"""The gate before a request's body: the token is checked from the headers, then the body limit (413) that this
caller gets is enforced while the body streams in, before any of it is parsed or spooled. An unauthenticated client
cannot make the server read, spool or hold anything."""

from __future__ import annotations

from knowngood.service.problems import Problem, problem_response
from starlette.datastructures import Headers
from starlette.types import ASGIApp, Message, Receive, Scope, Send

TITLE = "Upload too large"


class BodyGate:
    """`check(method, path, headers)` gives the byte limit of a request's body, or raises Problem (401, 403) before
    a byte of the body is read. A declared Content-Length over the limit is refused at once; a body that grows past
    it (chunked uploads) as soon as it does. Refusals before the body close the connection (its body is unread)."""

    def __init__(self, app: ASGIApp, check):
        self.app = app
        self.check = check

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = Headers(scope=scope)
        try:
            limit = self.check(scope["method"], scope["path"], headers)
        except Problem as exc:
            close = {**(exc.headers or {}), "Connection": "close"}
            await problem_response(exc.status_code, exc.detail, title=exc.title, headers=close)(scope, receive, send)
            return
        declared = headers.get("content-length")
        if declared is not None and declared.isdigit() and int(declared) > limit:
            await problem_response(413, _detail(int(declared), limit), title=TITLE, headers={"Connection": "close"})(
                scope, receive, send
            )
            return
        received = 0

        async def limited_receive() -> Message:
            nonlocal received
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > limit:
                    raise Problem(413, _detail(received, limit, at_least=True), title=TITLE)
            return message

        await self.app(scope, limited_receive, send)


def _detail(size: int, limit: int, *, at_least: bool = False) -> str:
    return f"the request body is {'over ' if at_least else ''}{size} bytes; the limit here is {limit} bytes"
