"""The console's decision look-up (audit): one decision by its recommendation id, with the
inclusion proof of its record once sealed, or the decisions of a case id, newest first.
See docs/console.md."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request, Response
from sqlalchemy.orm import Session

from service.console.deps import Who, read_session, require_audit
from service.console.web import PREFIX, ConsoleRoute, render
from service.errors import NotFound
from service.log.records import DECISION

router = APIRouter(prefix=PREFIX, route_class=ConsoleRoute, include_in_schema=False)

CASE_PAGE = 20
"""Decisions of a case shown per page (older ones a link away)."""


def _proof(session: Session, row_id: int) -> dict[str, Any] | None:
    """The inclusion proof of decision row ``row_id`` against the latest signed head, as
    ``GET /v1/log/proofs/inclusion`` gives it, or None when it is not sealed yet."""
    from service.store.log_proofs import inclusion

    try:
        return inclusion(session, DECISION, row_id).as_json()
    except NotFound as exc:
        if exc.code in ("not_sealed", "no_seal"):
            return None
        raise


@router.get("/decisions")
def decision_page(
    request: Request, who: Who, id: str = "", case: str = "", before: int | None = None
) -> Response:
    from service.store.decision_lookup import MAX_CASE_PAGE, decisions_of_case, find_decision

    require_audit(who)
    wanted, case_id = id.strip()[:128], case.strip()[:128]
    decision, proof, listing = None, None, None
    message, status_code = None, 200
    with read_session(request) as session:
        if wanted:
            try:
                decision = find_decision(session, wanted)
                proof = _proof(session, decision.row_id)
            except NotFound as exc:
                message, status_code = exc.message, 404
        elif case_id:
            bound = None if before is None else max(1, min(before, 2**62))
            listing = decisions_of_case(
                session, case_id, None, min(CASE_PAGE, MAX_CASE_PAGE), bound
            )
            if not listing.decisions and bound is None:
                message, status_code = f"no decision has the case id {case_id!r}", 404
    return render(
        request,
        "decision.html",
        status_code,
        who=who,
        title="Decision look-up",
        wanted=wanted,
        case_id=case_id,
        decision=decision,
        proof=proof,
        listing=listing,
        message=message,
    )
