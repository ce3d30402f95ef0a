"""The console's decision look-up (audit). See docs/console.md."""

from __future__ import annotations

from fastapi import APIRouter, Request, Response

from service.console.deps import Who, read_session, require_audit
from service.console.web import PREFIX, ConsoleRoute, render
from service.errors import NotFound

router = APIRouter(prefix=PREFIX, route_class=ConsoleRoute, include_in_schema=False)


@router.get("/decisions")
def decision_page(request: Request, who: Who, id: str = "") -> Response:
    from service.store.decision_lookup import find_decision

    require_audit(who)
    wanted = id.strip()[:128]
    decision, message, status_code = None, None, 200
    if wanted:
        with read_session(request) as session:
            try:
                decision = find_decision(session, wanted)
            except NotFound as exc:
                message, status_code = exc.message, 404
    return render(
        request,
        "decision.html",
        status_code,
        who=who,
        title="Decision look-up",
        wanted=wanted,
        decision=decision,
        message=message,
    )
