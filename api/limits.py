"""Request body size limit, enforced while the body streams in.

A declared Content-Length over the limit is refused before reading; otherwise the body is read
chunk by chunk (chunked transfer included) and refused as soon as it passes the limit. The
accepted body is then replayed to the app, which parses JSON from memory anyway.
"""

from __future__ import annotations

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from honing.api.problems import PROBLEM_MEDIA_TYPE, problem_bytes

__all__ = ["BodyLimitMiddleware"]


class BodyLimitMiddleware:
    """ASGI middleware answering 413 (problem+json) to bodies over ``max_bytes``."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = dict(scope["headers"]).get(b"content-length")
        if declared is not None and (not declared.isdigit() or int(declared) > self.max_bytes):
            await self._refuse(send)
            return
        chunks: list[bytes] = []
        total = 0
        while True:
            message = await receive()
            if message["type"] == "http.disconnect":
                return
            body = message.get("body", b"")
            total += len(body)
            if total > self.max_bytes:
                await self._refuse(send)
                return
            chunks.append(body)
            if not message.get("more_body", False):
                break
        replayed = False

        async def replay() -> Message:
            nonlocal replayed
            if replayed:
                return await receive()
            replayed = True
            return {"type": "http.request", "body": b"".join(chunks), "more_body": False}

        await self.app(scope, replay, send)

    async def _refuse(self, send: Send) -> None:
        body = problem_bytes(413, f"the request body is larger than {self.max_bytes} bytes")
        await send(
            {
                "type": "http.response.start",
                "status": 413,
                "headers": [
                    (b"content-type", PROBLEM_MEDIA_TYPE.encode()),
                    (b"content-length", str(len(body)).encode()),
                    (b"connection", b"close"),
                ],
            }
        )
        await send({"type": "http.response.body", "body": body})
