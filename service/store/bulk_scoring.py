"""Streaming bulk scoring: requests decided and recorded chunk by chunk, answers in order.

The bulk paths (``POST /v1/recommendations/stream`` and ``evenhand score``) never hold more
than one chunk of requests: they read up to ``chunk_size`` lines, decide and record them with
:func:`service.store.scoring.recommend_batch` (the batch route's own function, with its
transactions and its request_id idempotency), hand back the answers and read on. Every
answer handed back is committed; a repeated ``request_id`` is answered from its stored
record, so a retried stream replays the same answers and writes nothing new.

A bad line stops the stream. The lines before it are decided, recorded and answered (the
chunk holding it is recorded up to the line before it), then its error is handed back and
nothing after it is read. A line number counts every line of the input from 1, blank lines
included (they are skipped); errors name it in their field (``line.7.score``).
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Engine

from service.errors import BatchRefused, ServiceError, Unprocessable, item_index
from service.store import scoring
from service.store.scoring import ScoreInput, ScoringContext

CHUNK_ROWS = 5_000
"""Requests decided and committed together (capped by ``EVENHAND_MAX_BATCH_ITEMS``)."""


class LineRefused(Unprocessable):
    """A refused line of a stream: the refusal's own code, its field prefixed with the line
    number (``line.7.score``), the message beginning with it."""

    def __init__(
        self,
        number: int,
        code: str,
        message: str,
        field: str | None,
        details: list[dict[str, Any]] | None = None,
    ) -> None:
        where = f"line {number}" + (f": {field}" if field else "")
        super().__init__(
            f"{where}: {message}",
            code=code,
            field=f"line.{number}" + (f".{field}" if field else ""),
            details=details,
        )
        self.line = number
        self.column = field
        self.reason = message


def refused_line(number: int, detail: dict[str, Any]) -> LineRefused:
    """A problem detail (``{"code", "message", "field"}``; a batch's ``items.<i>...`` prefix
    dropped) as the refusal of line ``number``."""
    field = detail.get("field")
    if field is not None and field.startswith("items."):
        field = field.split(".", 2)[2] if field.count(".") >= 2 else None
    return LineRefused(number, str(detail["code"]), str(detail["message"]), field)


@dataclass(frozen=True, slots=True)
class Chunk:
    """Requests read in order, with their line numbers, and the problem that ended the
    reading if one did (then this is the last chunk)."""

    requests: list[ScoreInput]
    lines: list[int]
    problem: ServiceError | None = None


@dataclass(frozen=True, slots=True)
class ChunkAnswer:
    """What a chunk gave: the answers (JSON text of each request, in order), how many were
    newly written, and the error that stops the stream after them, if any."""

    responses: list[str]
    created: int
    error: ServiceError | None


def chunk_size(ctx: ScoringContext, wanted: int = CHUNK_ROWS) -> int:
    """The chunk size: ``wanted`` within what one batch may hold."""
    return max(1, min(wanted, ctx.max_batch_items))


def score_chunk(engine: Engine, chunk: Chunk, ctx: ScoringContext) -> ChunkAnswer:
    """Decide and record a chunk (committed before this returns). If the store refuses a
    request, the requests before it are recorded and answered, and the refusal is the error;
    a reading problem comes after every request of the chunk. A request_id repeated within
    the chunk is answered as a replay of its first use, as it would be in a later chunk (the
    batch refuses repeats: the requests up to the repeat are recorded first)."""
    requests, error = chunk.requests, chunk.problem
    responses: list[str] = []
    created = 0
    start, end, limit = 0, len(requests), len(requests)
    while start < end:
        try:
            out, new = scoring.recommend_batch(engine, requests[start:end], ctx)
        except BatchRefused as exc:
            detail = exc.details[0]  # the details are sorted by item: the first refused
            at = start + item_index(detail["field"])
            if detail["code"] != "duplicate_request_id":
                error = refused_line(chunk.lines[at], detail)
                limit = at
            end = at  # record what comes before it (if the store moved on meanwhile and
            continue  # refuses an earlier one, that one becomes the first error)
        responses.extend(out)
        created += new
        start, end = end, limit
    return ChunkAnswer(responses, created, error)


Read = tuple[int, ScoreInput] | ServiceError
"""One line read: (its number, the request), or the problem that stops the reading."""


def chunks(lines: Iterable[Read], size: int) -> Iterator[Chunk]:
    """Group the lines read into chunks of ``size`` requests; a problem ends the last chunk."""
    requests: list[ScoreInput] = []
    numbers: list[int] = []
    for line in lines:
        if isinstance(line, ServiceError):
            yield Chunk(requests, numbers, line)
            return
        requests.append(line[1])
        numbers.append(line[0])
        if len(requests) == size:
            yield Chunk(requests, numbers)
            requests, numbers = [], []
    if requests:
        yield Chunk(requests, numbers)


def score_all(
    engine: Engine, lines: Iterable[Read], ctx: ScoringContext, size: int = CHUNK_ROWS
) -> Iterator[ChunkAnswer]:
    """Score ``lines`` chunk by chunk, handing back each chunk's answers once committed;
    stops after the first answer that carries an error.

    Pipelined, one chunk ahead on each side and never further: the next chunk is read while
    the current one is decided and written (on a worker thread), and it goes to the store
    only once the current one was answered without an error, so nothing after a bad line
    is written; it is written while the current answers are handed out.
    """
    pending = chunks(lines, chunk_size(ctx, size))
    with ThreadPoolExecutor(1, thread_name_prefix="bulk-scoring") as pool:
        first = next(pending, None)
        running = None if first is None else pool.submit(score_chunk, engine, first, ctx)
        while running is not None:
            upcoming = next(pending, None)  # read while the current chunk is written
            answer = running.result()
            running = None
            if answer.error is None and upcoming is not None:
                running = pool.submit(score_chunk, engine, upcoming, ctx)
            yield answer
            if answer.error is not None:
                return
