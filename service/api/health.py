"""Liveness and readiness probes (no authentication)."""

from __future__ import annotations

import logging

from fastapi import APIRouter, Request
from sqlalchemy import Engine, text

from service.api.errors import error_responses
from service.errors import ServiceUnavailable
from service.store.db import READ_ONLY, DatabaseUnavailable
from service.store.migrate import at_head

log = logging.getLogger("evenhand.api")
router = APIRouter(tags=["health"])


@router.get("/healthz", summary="The process is up (the database is not asked)")
def healthz() -> dict[str, str]:
    # Liveness: 200 while the process runs, also during a database outage (restarting the
    # process would not help; the service reconnects on its own). Readiness is /readyz.
    return {"status": "ok"}


@router.get(
    "/readyz",
    summary="The database is reachable and migrated to head",
    responses=error_responses(503),
)
def readyz(request: Request) -> dict[str, str]:
    engine: Engine = request.app.state.engine
    try:
        with engine.connect().execution_options(**{READ_ONLY: True}) as conn:
            conn.execute(text("SELECT 1"))
        current = at_head(engine)
    except Exception as exc:  # whatever the database says, the answer is "not ready"
        log.warning("readiness: database unavailable (%s)", type(exc).__name__)
        raise DatabaseUnavailable() from None
    if not current:
        raise ServiceUnavailable(
            "database schema is not at the latest migration: run `evenhand migrate`",
            code="migrations_pending",
        )
    return {"status": "ready"}
