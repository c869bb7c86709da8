"""Request body limits (413) enforced while the body streams in, before any of it is parsed or spooled."""

from __future__ import annotations

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.problems import Problem, problem_response

TITLE = "Upload too large"


class BodyLimitMiddleware:
    """`limit_for(method, path)` gives the byte limit of a request. A declared Content-Length over it is refused at
    once; a body that grows past it (chunked uploads) is refused as soon as it does."""

    def __init__(self, app: ASGIApp, limit_for):
        self.app = app
        self.limit_for = limit_for

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        limit = self.limit_for(scope["method"], scope["path"])
        declared = dict(scope.get("headers", [])).get(b"content-length")
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
