"""The server's periodic sealer: an asyncio task running the synchronous seal in a thread.

Every worker process may run one; the database lock in :func:`seal_pending` makes them take
turns, so several workers or replicas are safe. A failed seal is logged and tried again at
the next tick: unsealed records stay pending, nothing is lost.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging

from sqlalchemy.orm import Session, sessionmaker

from service.audit.seal import seal_all_pending
from service.store.db import is_unavailable

logger = logging.getLogger(__name__)


def seal_once(session_factory: sessionmaker[Session]) -> int:
    """Seal everything pending; the number of records sealed."""
    with session_factory() as session:
        return sum(s.record_count for s in seal_all_pending(session))


class PeriodicSealer:
    def __init__(self, session_factory: sessionmaker[Session], interval_seconds: float) -> None:
        self._session_factory = session_factory
        self._interval = interval_seconds
        self._stop = asyncio.Event()
        self._task: asyncio.Task[None] | None = None

    def start(self) -> None:
        if self._task is None:
            self._task = asyncio.create_task(self._run(), name="evenhand-sealer")

    async def stop(self) -> None:
        """Let a seal in progress finish (a thread cannot be interrupted), then end."""
        self._stop.set()
        if self._task is not None:
            await self._task
            self._task = None

    async def _run(self) -> None:
        while not self._stop.is_set():
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._stop.wait(), timeout=self._interval)
            if self._stop.is_set():
                return
            await self._tick()

    async def _tick(self) -> None:
        try:
            sealed = await asyncio.to_thread(seal_once, self._session_factory)
        except Exception as exc:
            if is_unavailable(exc):
                logger.warning(
                    "sealing: database unavailable (%s); trying again next interval",
                    type(exc).__name__,
                )
            else:
                logger.exception("sealing the decision log failed; trying again next interval")
            return
        if sealed:
            logger.info("sealed %d decision log records", sealed)
