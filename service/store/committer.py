"""Group commit for SQLite: many requests' writes share one transaction and one fsync.

With ``synchronous=FULL`` every SQLite commit waits for the disk (about 2 ms here), and
SQLite has one writer at a time, so one transaction per request caps throughput at a few
hundred requests per second however many threads wait. The committer thread takes every job
queued meanwhile, runs each inside its own SAVEPOINT (a failing job is undone alone and gets
its exception back), commits once, and only then wakes the waiting requests: each request's
record is durable before it answers, as before, and nothing is chained or ordered here.

PostgreSQL does not need this (its transactions run concurrently and it groups commits
itself), so the app only starts a committer on SQLite.
"""

from __future__ import annotations

import logging
import queue
import threading
from collections.abc import Callable
from typing import Any, Generic, TypeVar

from sqlalchemy import Engine
from sqlalchemy.orm import Session

from service.store.db import create_session_factory

log = logging.getLogger("evenhand.committer")
T = TypeVar("T")


class _Job(Generic[T]):
    __slots__ = ("done", "error", "fn", "result")

    def __init__(self, fn: Callable[[Session], T]) -> None:
        self.fn = fn
        self.done = threading.Event()
        self.result: T | None = None
        self.error: BaseException | None = None


class CommitterStopped(RuntimeError):
    pass


class GroupCommitter:
    def __init__(self, engine: Engine, max_group: int = 512) -> None:
        self._factory = create_session_factory(engine)
        self._queue: queue.SimpleQueue[_Job[Any] | None] = queue.SimpleQueue()
        self._max_group = max_group
        self._thread: threading.Thread | None = None
        self._running = False

    def start(self) -> None:
        self._running = True
        self._thread = threading.Thread(target=self._loop, name="evenhand-committer", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        if self._thread is None:
            return
        self._running = False
        self._queue.put(None)
        self._thread.join(timeout=30)
        self._thread = None

    def run(self, fn: Callable[[Session], T]) -> T:
        """Run ``fn(session)`` in the next group; return after that group has committed."""
        if not self._running:
            raise CommitterStopped("the server is shutting down")
        job: _Job[T] = _Job(fn)
        self._queue.put(job)
        job.done.wait()
        if job.error is not None:
            raise job.error
        return job.result  # type: ignore[return-value]

    def _next_group(self) -> list[_Job[Any]] | None:
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
            self._run_group(jobs)
        # Refuse whatever arrived after the stop.
        while True:
            try:
                job = self._queue.get_nowait()
            except queue.Empty:
                return
            if job is not None:
                job.error = CommitterStopped("the server is shutting down")
                job.done.set()

    def _run_group(self, jobs: list[_Job[Any]]) -> None:
        with self._factory() as session:
            try:
                for job in jobs:
                    savepoint = session.begin_nested()
                    try:
                        job.result = job.fn(session)
                        savepoint.commit()
                    except Exception as exc:
                        savepoint.rollback()
                        job.error = exc
                session.commit()
            except Exception as exc:  # the commit itself failed: nobody's write is durable
                log.error("group commit failed: %s", type(exc).__name__)
                session.rollback()
                for job in jobs:
                    if job.error is None:
                        job.error = exc
                        job.result = None
            finally:
                for job in jobs:
                    job.done.set()
