"""The console's log page (audit): the latest signed head, the last verification's result
as stored, and a button that starts a verification off the request (a thread of the server
process; the result is kept in ``log_verifications``). See docs/console.md."""

from __future__ import annotations

import logging
import threading
from collections.abc import Mapping
from typing import Any

from fastapi import APIRouter, Request, Response
from sqlalchemy.orm import Session, sessionmaker

from service.console.deps import PostedForm, Who, read_session, require_audit
from service.console.web import PREFIX, ConsoleRoute, check_csrf, redirect, render

router = APIRouter(prefix=PREFIX, route_class=ConsoleRoute, include_in_schema=False)
_log = logging.getLogger(__name__)


def _run(factory: sessionmaker[Session], run_id: int, trusted: Mapping[str, bytes]) -> None:
    """The thread's work: a failure is kept in the run's row (and logged), never raised."""
    from service.store.log_verifications import run_and_keep

    try:
        run_and_keep(factory, run_id, trusted)
    except Exception:
        _log.exception("log verification %d could not finish", run_id)


def _latest_head(request: Request) -> dict[str, Any] | None:
    from sqlalchemy import select

    from service.store.audit_models import Seal
    from service.store.sealing import signed_head

    with read_session(request) as session:
        seal = session.scalars(select(Seal).order_by(Seal.id.desc()).limit(1)).first()
        return None if seal is None else signed_head(seal)


def _runs(request: Request) -> tuple[Any, Any]:
    """The run in progress (or None) and the last finished run (or None), detached."""
    from service.store import log_verifications as runs
    from service.store.models import utcnow

    with read_session(request) as session:
        running, done = runs.current_and_last(session, utcnow())
        session.expunge_all()
    return running, done


@router.get("/log")
def log_page(request: Request, who: Who, started: str = "") -> Response:
    require_audit(who)
    running, done = _runs(request)
    return render(
        request,
        "log.html",
        who=who,
        title="The log",
        head=_latest_head(request),
        running=running,
        run=done,
        already=started == "already",
    )


@router.post("/log/verify")
def log_verify(request: Request, who: Who, form: PostedForm) -> Response:
    """Start a verification of the whole log (the same ``verify_log`` as
    ``GET /v1/log/verify``, with the same trusted keys) in a thread of this process, and go
    back to the page, which shows it running until its result is stored."""
    from service.store import log_verifications as runs
    from service.store.signing import trusted_public_keys

    check_csrf(form, who.csrf)
    require_audit(who)
    factory = request.app.state.session_factory
    trusted = trusted_public_keys(request.app.state.settings)
    run_id = runs.start_run(factory, f"console: {who.key_name}")
    if run_id is None:
        return redirect(f"{PREFIX}/log?started=already")
    threading.Thread(
        target=_run,
        args=(factory, run_id, trusted),
        name=f"evenhand-log-verify-{run_id}",
        daemon=True,
    ).start()
    return redirect(f"{PREFIX}/log")
