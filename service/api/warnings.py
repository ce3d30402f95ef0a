"""Warnings before outcomes arrive (audit role): one day's score drift and action rates."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query

from service.api.deps import AppSettings, AuditKey, DbSession
from service.api.errors import error_responses
from service.api.fields import PolicyPath
from service.audit.early_warning_job import parse_day, run_day_warnings
from service.audit.warnings_model import DayWarningsBody, warnings_body
from service.store.db import begin_read_only

router = APIRouter(tags=["audit"], responses=error_responses(401, 403, 404, 422))


@router.get(
    "/v1/warnings/{policy}",
    response_model=DayWarningsBody,
    summary="One day's warnings before outcomes arrive: score drift and action rates by group",
)
def get_warnings(
    policy: PolicyPath,
    session: DbSession,
    _key: AuditKey,
    settings: AppSettings,
    day: Annotated[
        str,
        Query(
            pattern=r"^[0-9]{4}-[0-9]{2}-[0-9]{2}$",
            description="the day, YYYY-MM-DD, in the configured time zone",
        ),
    ],
) -> DayWarningsBody:
    parsed = parse_day(day)
    begin_read_only(session)
    found = run_day_warnings(session, policy, parsed, settings.timezone)
    return warnings_body(policy, parsed, settings.timezone, found)
