"""Streaming bulk scoring (scoring role): newline-delimited JSON in, newline-delimited JSON out.

``POST /v1/recommendations/stream`` reads its body as it arrives, one
``RecommendationRequest`` per line, and answers one ``RecommendationResponse`` per line in the
same order, chunk by chunk (``service.store.bulk_scoring``): a chunk is decided and committed
by the batch route's own function before any of its answers is sent, so every answer received
is on the record, and a retried stream replays the same answers. At most one chunk of lines is
held in memory, and one line may be at most ``MAX_LINE_BYTES`` long; the body size limit of
the other routes does not apply (``service.api.limits``).

A bad line stops the stream: every line before it is answered, then one error line in the one
error shape (``{"error": {...}}``, its field ``line.<n>.<field>``), and nothing after it is
read. If the very first chunk holds no good line before the bad one, the answer is the
error's own status instead (422, 413...), as on the other routes.
"""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator
from typing import Any

from fastapi import APIRouter, Request, Response
from fastapi.concurrency import run_in_threadpool
from pydantic import TypeAdapter, ValidationError
from sqlalchemy.exc import SQLAlchemyError
from starlette.responses import StreamingResponse
from starlette.types import Receive, Scope, Send

from service.api.deps import ScoringKey
from service.api.errors import error_responses, service_error_response, validation_details
from service.api.recommendation_schemas import RecommendationRequest
from service.errors import ServiceError, Unprocessable
from service.store.bulk_scoring import (
    Chunk,
    ChunkAnswer,
    LineRefused,
    chunk_size,
    score_chunk,
)
from service.store.db import DatabaseUnavailable, is_unavailable
from service.store.scoring import ScoreInput, ScoringContext

NDJSON = "application/x-ndjson"
MAX_LINE_BYTES = 64 * 1024
"""Longest line: a request at its bounds (32 attributes of 64-character names and values,
every character escaped) fits several times over."""
PATH = "/v1/recommendations/stream"

router = APIRouter(prefix="/v1/recommendations", tags=["recommendations"])

_MANY = TypeAdapter(list[RecommendationRequest])


class _Stream(StreamingResponse):
    """A streaming answer that does not listen for a disconnect while it sends: the body is
    still being read as the answers go out, and a listener would swallow its messages. A
    client that goes away stops the stream when the next read or send fails."""

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        await self.stream_response(send)


def _too_long(number: int) -> LineRefused:
    return LineRefused(
        number, "line_too_long", f"is longer than {MAX_LINE_BYTES} bytes; is it one request?", None
    )


def _parse(lines: list[tuple[int, bytes]]) -> Chunk:
    """The requests of ``lines`` (all validated in one pass in the common case), up to the
    first bad line, whose refusal ends the chunk."""
    try:
        requests = _MANY.validate_json(b"[" + b",".join(raw for _, raw in lines) + b"]")
        return Chunk(list[ScoreInput](requests), [n for n, _ in lines])
    except ValidationError:
        pass
    good: list[ScoreInput] = []
    for number, raw in lines:
        try:
            good.append(RecommendationRequest.model_validate_json(raw))
        except ValidationError as exc:
            return Chunk(good, [n for n, _ in lines[: len(good)]], _line_problem(number, exc))
    raise AssertionError("a chunk refused as a whole has a bad line")  # pragma: no cover


def _line_problem(number: int, exc: ValidationError) -> LineRefused:
    errors = exc.errors()
    bad_json = next((e for e in errors if e.get("type") == "json_invalid"), None)
    if bad_json is not None:
        reason = (bad_json.get("ctx") or {}).get("error", "invalid JSON")
        return LineRefused(number, "malformed_json", f"is not valid JSON: {reason}", None)
    details = validation_details(errors)
    for detail in details:
        detail["field"] = f"line.{number}" + (f".{detail['field']}" if detail["field"] else "")
    first = details[0]
    field = first["field"].split(".", 2)[2] if first["field"].count(".") >= 2 else None
    return LineRefused(number, "validation_error", first["message"], field, details)


async def _chunks(request: Request, size: int) -> AsyncIterator[Chunk]:
    """The body's requests in chunks of ``size`` as it arrives (split piece by piece, not
    line by line), up to the first bad line, whose refusal ends the last chunk."""
    pending: list[tuple[int, bytes]] = []
    number = 0
    tail = bytearray()  # the unfinished line: appended to, so tiny pieces cost no copies
    ended = False
    stream = request.stream()
    while not ended:
        piece = await anext(stream, None)
        parts: list[bytes] = []
        if piece is None:
            ended, parts = True, [bytes(tail)]
        else:
            tail += piece
            if b"\n" in piece:
                parts = bytes(tail).split(b"\n")
                tail = bytearray(parts.pop())
        if len(tail) > MAX_LINE_BYTES:
            ended, parts = True, [*parts, bytes(tail)]
        for raw in parts:
            number += 1
            if len(raw) > MAX_LINE_BYTES:
                chunk = _parse(pending) if pending else Chunk([], [])
                yield Chunk(chunk.requests, chunk.lines, chunk.problem or _too_long(number))
                return
            if not raw.strip():
                continue
            pending.append((number, raw))
            if len(pending) == size:
                chunk, pending = _parse(pending), []
                yield chunk
                if chunk.problem is not None:
                    return
    if pending:
        yield _parse(pending)


class UnsupportedMediaType(ServiceError):
    status_code = 415
    code = "unsupported_media_type"


def _error_line(exc: ServiceError) -> bytes:
    return bytes(service_error_response(exc).body) + b"\n"


def _lines_of(*models: str) -> dict[str, Any]:
    """The schema of newline-delimited JSON: an array of its lines (each one of ``models``)."""
    refs = [{"$ref": f"#/components/schemas/{m}"} for m in models]
    return {"type": "array", "items": refs[0] if len(refs) == 1 else {"anyOf": refs}}


@router.post(
    "/stream",
    status_code=200,
    summary="Any number of recommendations as newline-delimited JSON, answered line by line",
    response_model=None,
    responses={
        200: {
            "description": "One RecommendationResponse per line, in input order; if a line "
            "is refused after some were answered, one ErrorResponse line ends the stream",
            "content": {NDJSON: {"schema": _lines_of("RecommendationResponse", "ErrorResponse")}},
        },
        **error_responses(400, 401, 403, 409, 413, 415, 422),
    },
    openapi_extra={
        "requestBody": {
            "required": True,
            "description": "One RecommendationRequest per line (UTF-8, lines of at most "
            f"{MAX_LINE_BYTES} bytes, blank lines skipped); the schema lists the lines",
            "content": {NDJSON: {"schema": _lines_of("RecommendationRequest")}},
        }
    },
)
async def recommend_stream(request: Request, _key: ScoringKey) -> Response:
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if media != NDJSON:
        raise UnsupportedMediaType(f"send newline-delimited JSON with Content-Type: {NDJSON}")
    ctx: ScoringContext = request.app.state.scoring
    answers = _pipeline(_chunks(request, chunk_size(ctx)), request.app.state.engine, ctx)
    first = await anext(answers, None)
    if first is None:
        raise Unprocessable("the body holds no request", code="empty_stream")
    if first.error is not None and not first.responses:
        raise first.error  # nothing answered yet: the error's own status
    return _Stream(_lines_out(first, answers), media_type=NDJSON)


async def _pipeline(
    reader: AsyncIterator[Chunk], engine: Any, ctx: ScoringContext
) -> AsyncIterator[ChunkAnswer]:
    """Each chunk's answer once committed, in order; the same pipeline as
    ``bulk_scoring.score_all``: the next chunk is read while the current one is written, and
    written only after the current one was answered without an error."""
    first = await anext(reader, None)
    running = None if first is None else _start(engine, first, ctx)
    while running is not None:
        upcoming = await anext(reader, None)
        answer = await running
        running = None
        if answer.error is None and upcoming is not None:
            running = _start(engine, upcoming, ctx)
        yield answer
        if answer.error is not None:
            return


def _start(engine: Any, chunk: Chunk, ctx: ScoringContext) -> asyncio.Future[ChunkAnswer]:
    return asyncio.ensure_future(run_in_threadpool(score_chunk, engine, chunk, ctx))


async def _lines_out(
    first: ChunkAnswer, answers: AsyncIterator[ChunkAnswer]
) -> AsyncIterator[bytes]:
    answer: ChunkAnswer | None = first
    while answer is not None:
        if answer.responses:
            yield ("\n".join(answer.responses) + "\n").encode("utf-8")
        if answer.error is not None:
            yield _error_line(answer.error)
            return
        try:
            answer = await anext(answers, None)
        except SQLAlchemyError as exc:
            # The status went out with the first answers: the error handlers cannot answer
            # any more, so an unavailable database ends the stream with its error line.
            if not is_unavailable(exc):
                raise
            answer = ChunkAnswer([], 0, DatabaseUnavailable())
