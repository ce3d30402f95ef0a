"""The decision log: verification for auditors (audit role)."""

from __future__ import annotations

from typing import Annotated, Literal

from fastapi import APIRouter, Query
from pydantic import BaseModel, Field

from service.api.deps import AuditKey, DbSession
from service.api.errors import error_responses
from service.audit.seal import VerifyResult, verify_log

router = APIRouter(prefix="/v1/log", tags=["decision log"])


class LogProblem(BaseModel):
    kind: Literal["record", "seal"] = Field(description="what does not match")
    id: int = Field(description="row id of the record or seal (0: the expected seal is missing)")
    reason: str


class VerifyResponse(BaseModel):
    ok: bool = Field(description="every record hash, seal root and chain link matches")
    seals_checked: int
    records_checked: int
    unsealed_records: int = Field(description="records not sealed yet (checked, not chained)")
    head_seal_id: int | None
    head_seal_hash: str | None = Field(
        description="keep this outside the database: passing it back later detects a cut-back log"
    )
    problem: LogProblem | None = Field(description="the first record or seal that does not match")

    @classmethod
    def of(cls, result: VerifyResult) -> VerifyResponse:
        problem = result.problem
        return cls(
            ok=result.ok,
            seals_checked=result.seals_checked,
            records_checked=result.records_checked,
            unsealed_records=result.unsealed_records,
            head_seal_id=result.head_seal_id,
            head_seal_hash=result.head_seal_hash,
            problem=None
            if problem is None
            else LogProblem(kind=problem.kind, id=problem.id, reason=problem.reason),
        )


HexHash = Annotated[str, Query(pattern=r"^[0-9a-f]{64}$")]


@router.get(
    "/verify",
    summary="Recompute every record hash, seal root and the seal chain",
    response_model=VerifyResponse,
    responses=error_responses(401, 403, 422),
)
def verify(
    _key: AuditKey, session: DbSession, expected_seal_hash: HexHash | None = None
) -> VerifyResponse:
    """200 with ``ok: false`` and the first mismatch when the log was tampered with.

    ``expected_seal_hash``: a seal hash recorded earlier outside the database; verification
    fails if the chain no longer contains it.
    """
    return VerifyResponse.of(verify_log(session, expected_seal_hash))
