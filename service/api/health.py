"""Liveness and readiness probes (no authentication)."""

from __future__ import annotations

from fastapi import APIRouter, Request
from sqlalchemy import Engine, text

from service.api.errors import error_responses
from service.errors import ServiceUnavailable
from service.store.db import READ_ONLY
from service.store.migrate import at_head

router = APIRouter(tags=["health"])


@router.get("/healthz", summary="The process is up")
def healthz() -> dict[str, str]:
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
    except Exception as exc:
        raise ServiceUnavailable(
            f"database unreachable ({type(exc).__name__})", code="database_unreachable"
        ) from None
    if not at_head(engine):
        raise ServiceUnavailable(
            "database schema is not at the latest migration: run `evenhand migrate`",
            code="migrations_pending",
        )
    return {"status": "ready"}
