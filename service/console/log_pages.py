"""The console's log page (audit): the latest signed head and the log's verification.
See docs/console.md."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request, Response

from service.console.deps import PostedForm, Who, read_session, require_audit
from service.console.web import PREFIX, ConsoleRoute, check_csrf, render

router = APIRouter(prefix=PREFIX, route_class=ConsoleRoute, include_in_schema=False)


def _latest_head(request: Request) -> dict[str, Any] | None:
    from sqlalchemy import select

    from service.store.audit_models import Seal
    from service.store.sealing import signed_head

    with read_session(request) as session:
        seal = session.scalars(select(Seal).order_by(Seal.id.desc()).limit(1)).first()
        return None if seal is None else signed_head(seal)


@router.get("/log")
def log_page(request: Request, who: Who) -> Response:
    require_audit(who)
    return render(
        request, "log.html", who=who, title="The log", head=_latest_head(request), result=None
    )


@router.post("/log/verify")
def log_verify(request: Request, who: Who, form: PostedForm) -> Response:
    """Recompute the whole log: the same function as ``GET /v1/log/verify``."""
    from service.store.log_verify import verify_log
    from service.store.signing import trusted_public_keys

    check_csrf(form, who.csrf)
    require_audit(who)
    settings = request.app.state.settings
    result = verify_log(request.app.state.session_factory, trusted_public_keys(settings))
    return render(
        request,
        "log.html",
        who=who,
        title="The log",
        head=_latest_head(request),
        result=result,
    )
