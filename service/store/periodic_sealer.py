"""The server's periodic sealer: an asyncio task running the log's upkeep in a thread.

Every worker process runs one. On PostgreSQL a round runs only in the process that holds the
upkeep lock (``service.store.log_upkeep``); the others skip their tick, so N workers do one
worker's sealing, not N. Without the lock it would still be safe (seals and tally batches take
consecutive ids: of two processes writing the same one, one succeeds and the other finds
nothing left), only wasteful. A failed round is logged and tried again at the next tick:
unsealed records stay pending, nothing is lost.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging

from sqlalchemy.orm import Session, sessionmaker

from service.store.db import is_unavailable
from service.store.log_upkeep import keep_log
from service.store.signing import Signer

logger = logging.getLogger(__name__)


class PeriodicSealer:
    def __init__(
        self,
        session_factory: sessionmaker[Session],
        signer: Signer,
        time_zone: str,
        interval_seconds: float,
        mirror: str | None = None,
    ) -> None:
        self._session_factory = session_factory
        self._signer = signer
        self._time_zone = time_zone
        self._mirror = mirror
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
            done = await asyncio.to_thread(
                keep_log,
                self._session_factory,
                self._signer,
                self._time_zone,
                mirror=self._mirror,
                wait=False,  # another worker is sealing: this tick has nothing to do
            )
        except Exception as exc:
            if is_unavailable(exc):
                logger.warning(
                    "sealing: database unavailable (%s); trying again next interval",
                    type(exc).__name__,
                )
            else:
                logger.exception("sealing the log failed; trying again next interval")
            return
        if done.sealed:
            logger.info("sealed %d log records", done.sealed)
