"""Rejects oversized request bodies before the application reads them.

By ``Content-Length`` before a byte is read; a body without one (chunked) is counted as it
streams in, buffered up to the limit and then handed to the application unchanged. A
declared length within the limit is passed straight through: the HTTP server frames the
body by that header and never delivers more. Streaming routes (``unbounded_paths``) bound
each line instead and are passed through unread.
"""

from __future__ import annotations

import json

from starlette.types import ASGIApp, Message, Receive, Scope, Send


class BodySizeLimit:
    def __init__(
        self, app: ASGIApp, max_bytes: int, unbounded_paths: frozenset[str] = frozenset()
    ) -> None:
        self.app = app
        self.max_bytes = max_bytes
        self.unbounded_paths = unbounded_paths

    async def _reject(self, send: Send) -> None:
        body = json.dumps(
            {
                "error": {
                    "code": "body_too_large",
                    "message": f"the request body is larger than {self.max_bytes} bytes "
                    "(EVENHAND_MAX_BODY_BYTES); split the batch",
                    "field": None,
                    "details": [],
                }
            }
        ).encode()
        await send(
            {
                "type": "http.response.start",
                "status": 413,
                "headers": [
                    (b"content-type", b"application/json"),
                    (b"content-length", str(len(body)).encode()),
                    (b"connection", b"close"),
                ],
            }
        )
        await send({"type": "http.response.body", "body": body})

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if (
            scope["type"] != "http"
            or scope["method"] in ("GET", "HEAD", "OPTIONS")
            or scope["path"] in self.unbounded_paths
        ):
            await self.app(scope, receive, send)
            return
        declared = -1
        chunked = False
        for name, value in scope["headers"]:
            if name == b"transfer-encoding":
                chunked = True
            elif name == b"content-length":
                try:
                    declared = int(value)
                except ValueError:
                    declared = -1
                if declared > self.max_bytes:
                    await self._reject(send)
                    return
        if declared >= 0 and not chunked:
            # The HTTP server delivers exactly Content-Length bytes (it frames the body by
            # that header), so a declared size within the limit needs no counting.
            await self.app(scope, receive, send)
            return
        chunks: list[bytes] = []
        size = 0
        while True:
            message = await receive()
            if message["type"] == "http.disconnect":
                return
            chunk = message.get("body", b"")
            size += len(chunk)
            if size > self.max_bytes:
                await self._reject(send)
                return
            chunks.append(chunk)
            if not message.get("more_body", False):
                break
        body = b"".join(chunks)
        sent = False

        async def replay() -> Message:
            nonlocal sent
            if not sent:
                sent = True
                return {"type": "http.request", "body": body, "more_body": False}
            return await receive()

        await self.app(scope, replay, send)
