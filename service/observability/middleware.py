"""The outermost ASGI middleware: a request id for every request (the caller's
``X-Request-ID`` when it is a plain token, else a new one), echoed in the response; the
request's latency in the histogram by route template and status; one access-log line.

Pure ASGI (no per-request objects beyond a closure): a few microseconds per request.
"""

from __future__ import annotations

import logging
import re
import time
import uuid
from typing import Any

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.observability.json_logs import request_id_var
from service.observability.metrics import RequestMetrics

HEADER = b"x-request-id"
_ACCEPTED = re.compile(rb"[A-Za-z0-9._:\-]{1,128}")
access_log = logging.getLogger("evenhand.access")


def request_id_of(scope: Scope) -> str:
    """The caller's ``X-Request-ID`` if it is 1-128 characters of ``[A-Za-z0-9._:-]``, else a
    new random id (32 hex digits): a header is never copied into logs unchecked."""
    name: bytes
    value: bytes
    for name, value in scope.get("headers", ()):
        if name == HEADER:
            if _ACCEPTED.fullmatch(value):
                return value.decode("ascii")
            break
    return uuid.uuid4().hex


def route_of(scope: Scope) -> str:
    """The matched route's template (``/v1/reports/{policy}``), never the raw path."""
    route = scope.get("route")
    path: object = getattr(route, "path", None)
    return path if isinstance(path, str) else "unmatched"


class RequestObserver:
    def __init__(self, app: ASGIApp, metrics: RequestMetrics, access_log_on: bool) -> None:
        self.app = app
        self.metrics = metrics
        self.access_log_on = access_log_on

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        request_id = request_id_of(scope)
        token = request_id_var.set(request_id)
        header = (HEADER, request_id.encode("ascii"))
        status = 500

        async def send_with_id(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
                headers: list[Any] = list(message.get("headers", ()))
                headers.append(header)
                message["headers"] = headers
            await send(message)

        try:
            await self.app(scope, receive, send_with_id)
        finally:
            elapsed = time.perf_counter() - started
            route = route_of(scope)
            self.metrics.observe(scope["method"], route, status, elapsed)
            if self.access_log_on and access_log.isEnabledFor(logging.INFO):
                access_log.info(
                    "request",
                    extra={
                        "request_id": request_id,
                        "method": scope["method"],
                        "route": route,
                        "status": status,
                        "duration_ms": round(elapsed * 1000, 3),
                    },
                )
            request_id_var.reset(token)
