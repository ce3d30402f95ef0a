"""Group commit for single recommendations: one thread decides and records them in groups.

A single recommendation is a few tens of microseconds of work (a policy lookup, an
evaluation, a record hash, one row) wrapped in a transaction that costs far more: statements,
a commit, on SQLite an fsync, on PostgreSQL round trips. The committer thread takes every
request queued meanwhile, decides the whole group in one transaction
(:func:`service.store.scoring.recommend_group`: one existing-request lookup, one active-version
lookup per policy, one multi-row insert), commits once, and only then settles the waiting
requests: each record is durable before its answer is sent, as before.

The requests' coroutines only wait (no thread-pool hop per request), and the waiting ends with
one wake-up of the event loop per group. Nothing is chained or ordered here: the seal step
orders records later. Each server process has one committer; several processes (or replicas)
each commit their own groups.

Failures stay with their request: a group that fails for any reason but an unavailable
database is rolled back and decided again one request per transaction (the good ones are
recorded, the bad one gets its own error). A lost connection is replaced and the group tried
once more; if the database is still unavailable, the group's requests get 503
``database_unavailable`` and the next group tries again (no restart needed).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import queue
import threading
from collections.abc import Sequence
from concurrent.futures import Future
from typing import Any

from sqlalchemy import Connection, Engine
from sqlalchemy.exc import IntegrityError

from service.errors import ServiceError, ServiceUnavailable
from service.store.db import DatabaseUnavailable, is_unavailable
from service.store.scoring import (
    GroupResult,
    ScoreInput,
    ScoringContext,
    recommend,
    recommend_group,
)

log = logging.getLogger("evenhand.committer")

Answer = tuple[str, bool]
"""(response JSON, created): created is False for a replay of a stored request."""


class CommitterStopped(ServiceUnavailable):
    def __init__(self) -> None:
        super().__init__(
            "the server is shutting down; retry the request (it is idempotent)",
            code="shutting_down",
        )


class _Job:
    __slots__ = ("future", "loop", "request")

    def __init__(
        self,
        request: ScoreInput,
        future: Future[Answer] | asyncio.Future[Answer],
        loop: asyncio.AbstractEventLoop | None,
    ) -> None:
        self.request = request
        self.future = future
        self.loop = loop  # set for an asyncio future: settled on its own loop


class GroupCommitter:
    def __init__(self, engine: Engine, ctx: ScoringContext, max_group: int = 256) -> None:
        self._engine = engine
        self._conn: Connection | None = None
        self._ctx = ctx
        self._queue: queue.SimpleQueue[_Job | None] = queue.SimpleQueue()
        self._max_group = max_group
        self._thread: threading.Thread | None = None
        self._running = False

    def start(self) -> None:
        self._running = True
        self._thread = threading.Thread(target=self._loop, name="evenhand-committer", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Finish the groups already queued, then refuse the rest."""
        if self._thread is None:
            return
        self._running = False
        self._queue.put(None)
        self._thread.join(timeout=30)
        self._thread = None

    async def recommend(self, request: ScoreInput) -> Answer:
        """Decide and record ``request``; return once its group has committed."""
        self._check_running()
        loop = asyncio.get_running_loop()
        future: asyncio.Future[Answer] = loop.create_future()
        self._queue.put(_Job(request, future, loop))
        return await future

    def recommend_blocking(self, request: ScoreInput) -> Answer:
        """The same from a plain thread (tests, benchmarks)."""
        self._check_running()
        future: Future[Answer] = Future()
        self._queue.put(_Job(request, future, None))
        return future.result()

    def queued(self) -> int:
        """Requests waiting for the next group (approximate; for monitoring and tests)."""
        return self._queue.qsize()

    def _check_running(self) -> None:
        if not self._running:
            raise CommitterStopped()

    def _next_group(self) -> list[_Job] | None:
        first = self._queue.get()
        if first is None:
            return None
        jobs = [first]
        while len(jobs) < self._max_group:
            try:
                job = self._queue.get_nowait()
            except queue.Empty:
                break
            if job is None:
                self._queue.put(None)  # stop after this group
                break
            jobs.append(job)
        return jobs

    def _loop(self) -> None:
        while True:
            jobs = self._next_group()
            if jobs is None:
                break
            try:
                results = self._decide([job.request for job in jobs])
                _settle(jobs, results)
            except Exception as exc:  # a defect of ours: answer the group, keep the thread
                log.exception("the committer could not settle a group of %d", len(jobs))
                self._close_connection(invalidate=True)
                _settle(jobs, [exc for _ in jobs])
        self._close_connection()
        # Refuse whatever arrived after the stop.
        refused: list[_Job] = []
        while True:
            try:
                job = self._queue.get_nowait()
            except queue.Empty:
                break
            if job is not None:
                refused.append(job)
        _settle(refused, [CommitterStopped() for _ in refused])

    def _decide(self, requests: list[ScoreInput]) -> Sequence[GroupResult | BaseException]:
        """Each request's outcome; never raises.

        The group is decided in one transaction. If the database is unavailable, the group
        is tried once more on a new connection (the old one may just have been cut: a
        restart, ``pg_terminate_backend``; nothing of the group was committed, or it was and
        the retry finds its request_ids stored and answers from the records), then every
        request gets 503 ``database_unavailable``. If anything else fails the group, be it
        one request the database refuses or one our code cannot record, the group is rolled
        back and its requests are decided one by one, each in its own transaction, so the
        failure stays with the request that caused it.
        """
        for attempt in (1, 2):
            try:
                return self._decide_group(requests)
            except Exception as exc:
                if not is_unavailable(exc):
                    if not isinstance(exc, IntegrityError):  # a request_id stored meanwhile
                        log.warning(
                            "a group of %d failed (%s); deciding its requests one by one",
                            len(requests),
                            type(exc).__name__,
                        )
                    return self._decide_each(requests)
                log.warning("group commit: database unavailable (%s)", type(exc).__name__)
                if attempt == 2:
                    return [DatabaseUnavailable() for _ in requests]
        raise AssertionError("unreachable")

    def _decide_group(self, requests: list[ScoreInput]) -> Sequence[GroupResult]:
        conn = self._connection()
        try:
            with conn.begin():
                return recommend_group(conn, requests, self._ctx)
        except BaseException as exc:
            if is_unavailable(exc) or not isinstance(exc, Exception):
                self._close_connection(invalidate=True)
            raise

    def _decide_each(self, requests: list[ScoreInput]) -> list[GroupResult | BaseException]:
        results: list[GroupResult | BaseException] = []
        for request in requests:
            if results and isinstance(results[-1], DatabaseUnavailable):
                results.append(DatabaseUnavailable())  # no use trying the rest now
                continue
            try:
                conn = self._connection()
                with conn.begin():
                    result = recommend(conn, request, self._ctx)
                results.append(result)  # only once committed: a failed commit is an error
            except ServiceError as exc:
                results.append(exc)
            except Exception as exc:
                if is_unavailable(exc):
                    self._close_connection(invalidate=True)
                    results.append(DatabaseUnavailable())
                else:
                    # This request alone: the database refused it, or it could not be built.
                    log.error("a request could not be recorded: %s", type(exc).__name__)
                    results.append(exc)
        return results

    def _connection(self) -> Connection:
        # One connection for the committer's life: no pool checkout (and on PostgreSQL no
        # pre-ping round trip) per group. Replaced after any failure.
        if self._conn is None:
            self._conn = self._engine.connect()
        return self._conn

    def _close_connection(self, invalidate: bool = False) -> None:
        if self._conn is not None:
            with contextlib.suppress(Exception):  # already broken: the pool discards it
                if invalidate:
                    self._conn.invalidate()  # never hand a cut connection to anyone again
                self._conn.close()
            self._conn = None


def _settle(jobs: list[_Job], results: Sequence[GroupResult | BaseException]) -> None:
    by_loop: dict[asyncio.AbstractEventLoop, list[tuple[_Job, Any]]] = {}
    for job, result in zip(jobs, results, strict=True):
        if job.loop is None:
            _set(job.future, result)
        else:
            by_loop.setdefault(job.loop, []).append((job, result))
    for loop, pairs in by_loop.items():
        with contextlib.suppress(RuntimeError):  # a closed loop: nobody waits any more
            loop.call_soon_threadsafe(_settle_on_loop, pairs)  # one wake-up per group


def _settle_on_loop(pairs: list[tuple[_Job, Any]]) -> None:
    for job, result in pairs:
        if not job.future.done():  # a cancelled request (client gone) keeps its record
            _set(job.future, result)


def _set(future: Future[Answer] | asyncio.Future[Answer], result: Any) -> None:
    if future.done():
        return
    if isinstance(result, BaseException):
        future.set_exception(result)
    else:
        future.set_result(result)
