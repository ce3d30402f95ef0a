"""The log: its public keys, its signed heads, verification, proofs and month bundles (audit
role)."""

from __future__ import annotations

import tempfile
from collections.abc import Iterator
from datetime import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Query, Request
from fastapi.responses import StreamingResponse
from pydantic import BaseModel, Field
from sqlalchemy import select
from sqlalchemy.orm import Session

from service.api.deps import AuditKey, ReadSession
from service.api.errors import error_responses
from service.api.fields import INT32_MAX
from service.audit.month import Month
from service.store import log_proofs
from service.store.audit_models import Seal, SigningKey
from service.store.bundle_export import export_month
from service.store.log_verify import VerifyResult, verify_log
from service.store.sealing import signed_head
from service.store.signing import Signer, trusted_public_keys

router = APIRouter(prefix="/v1/log", tags=["log"])


class LogProblem(BaseModel):
    kind: str = Field(
        description="what does not match: a kind of record (decision, outcome, final, "
        "snapshot, tally_batch, policy_version, policy_event, key_event, purge), a seal, a "
        "tree node or a tally"
    )
    id: int = Field(description="its row id (0 when there is none)")
    reason: str


class SignedHead(BaseModel):
    head: dict[str, Any] = Field(
        description="format, seal_id, tree_size, root (hex), created_at, key_id: the signed "
        "bytes are its canonical JSON (keys sorted, no spaces, UTF-8)"
    )
    signature: str = Field(description="Ed25519 signature of the head, hex")


class VerifyResponse(BaseModel):
    ok: bool = Field(description="every record, seal, signature, tree node and tally matches")
    seals_checked: int
    records_checked: int
    tally_batches_checked: int
    purged_through_seal: int = Field(
        description="seals up to this one had their personal records purged (retention); "
        "their leaf hashes were kept and are checked instead (0: nothing purged)"
    )
    purged_leaves: int = Field(description="leaves checked from kept hashes of purged records")
    unsealed: dict[str, int] = Field(description="records of each kind not sealed yet")
    head: SignedHead | None = Field(
        description="the latest signed head: keep it outside the database"
    )
    problem: LogProblem | None = Field(description="the first thing that does not match")

    @classmethod
    def of(cls, result: VerifyResult) -> VerifyResponse:
        problem = result.problem
        return cls(
            ok=result.ok,
            seals_checked=result.seals_checked,
            records_checked=result.records_checked,
            tally_batches_checked=result.tally_batches_checked,
            purged_through_seal=result.purged_through_seal,
            purged_leaves=result.purged_leaves,
            unsealed=result.unsealed,
            head=None if result.head is None else SignedHead.model_validate(result.head),
            problem=None
            if problem is None
            else LogProblem(kind=problem.kind, id=problem.id, reason=problem.reason),
        )


class PublicKey(BaseModel):
    key_id: str = Field(description="first 16 bytes of SHA-256 of the raw public key, hex")
    public_key: str = Field(description="raw 32-byte Ed25519 public key, hex")
    first_used_at: datetime | None = Field(description="when it first signed a head")
    current: bool = Field(description="the key the service signs with now")


@router.get(
    "/keys",
    summary="The public keys that sign the log's tree heads (no credential needed)",
    response_model=list[PublicKey],
)
def keys(request: Request, session: ReadSession) -> list[PublicKey]:
    signer: Signer = request.app.state.signer
    out = [
        PublicKey(
            key_id=row.key_id,
            public_key=bytes(row.public_key).hex(),
            first_used_at=row.first_used_at,
            current=row.key_id == signer.key_id,
        )
        for row in session.scalars(select(SigningKey).order_by(SigningKey.first_used_at))
    ]
    if not any(k.current for k in out):
        out.append(
            PublicKey(
                key_id=signer.key_id,
                public_key=signer.public_key.hex(),
                first_used_at=None,
                current=True,
            )
        )
    return out


@router.get(
    "/heads",
    summary="Signed tree heads, oldest first",
    response_model=list[SignedHead],
    responses=error_responses(401, 403, 422),
)
def heads(
    _key: AuditKey,
    session: ReadSession,
    since: Annotated[int, Query(ge=0, le=INT32_MAX, description="after this seal id")] = 0,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
) -> list[SignedHead]:
    seals = session.scalars(select(Seal).where(Seal.id > since).order_by(Seal.id).limit(limit))
    return [SignedHead.model_validate(signed_head(seal)) for seal in seals]


@router.get(
    "/verify",
    summary="Recompute every record, seal, signature, tree node and tally of the log",
    response_model=VerifyResponse,
    responses=error_responses(401, 403, 422),
)
def verify(_key: AuditKey, request: Request) -> VerifyResponse:
    """200 with ``ok: false`` and the first problem when the log was tampered with. Heads
    are checked against the service's own key and EVENHAND_TRUSTED_PUBLIC_KEYS."""
    settings = request.app.state.settings
    result = verify_log(request.app.state.session_factory, trusted_public_keys(settings))
    return VerifyResponse.of(result)


class InclusionProofResponse(BaseModel):
    kind: str
    record_id: int = Field(description="the record's row id")
    leaf_index: int = Field(description="its position among the leaves of the log")
    leaf_hash: str = Field(description="SHA-256(0x00 || record), hex (RFC 9162 section 2.1)")
    record: str = Field(description="the record's canonical bytes (UTF-8 JSON)")
    path: list[str] = Field(description="the audit path, deepest sibling first, hex")
    head: SignedHead = Field(description="the signed head the path leads to")


class ConsistencyProofResponse(BaseModel):
    first: SignedHead
    second: SignedHead
    path: list[str] = Field(description="RFC 9162 section 2.1.4 consistency proof, hex")


KindQuery = Annotated[
    str,
    Query(
        pattern=r"^[a-z_]{1,32}$",
        description="policy_version, policy_event, key_event, decision, outcome, final, "
        "snapshot or tally_batch",
    ),
]


@router.get(
    "/proofs/inclusion",
    summary="An inclusion proof of one record in a signed head (RFC 9162)",
    response_model=InclusionProofResponse,
    responses=error_responses(401, 403, 404, 422),
)
def inclusion_proof(
    _key: AuditKey,
    session: ReadSession,
    kind: KindQuery = "decision",
    id: Annotated[int | None, Query(ge=1, le=2**62, description="the record's row id")] = None,
    recommendation_id: Annotated[
        str | None,
        Query(max_length=64, description="for a decision: its recommendation_id instead of id"),
    ] = None,
    seal: Annotated[
        int | None, Query(ge=1, le=INT32_MAX, description="the head's seal (default: the latest)")
    ] = None,
) -> InclusionProofResponse:
    record_id = log_proofs.record_row_id(session, kind, id, recommendation_id)
    proof = log_proofs.inclusion(session, kind, record_id, seal)
    return InclusionProofResponse.model_validate(proof.as_json())


@router.get(
    "/proofs/consistency",
    summary="A consistency proof between two signed heads (RFC 9162)",
    response_model=ConsistencyProofResponse,
    responses=error_responses(401, 403, 404, 422),
)
def consistency_proof(
    _key: AuditKey,
    session: ReadSession,
    first: Annotated[int, Query(ge=1, le=INT32_MAX, description="the earlier seal")],
    second: Annotated[int, Query(ge=1, le=INT32_MAX, description="the later seal")],
) -> ConsistencyProofResponse:
    proof = log_proofs.consistency(session, first, second)
    return ConsistencyProofResponse.model_validate(proof.as_json())


_CHUNK = 1 << 20
_SPOOL = 8 << 20


@router.get(
    "/bundle",
    summary="One policy-month as a month bundle (.ehb), for the standalone verifier",
    response_class=StreamingResponse,
    responses={
        200: {
            "content": {"application/x-ndjson": {}},
            "description": "the bundle: JSON lines (docs/bundle.md)",
        },
        **error_responses(401, 403, 404, 422),
    },
)
def month_bundle(
    _key: AuditKey,
    session: ReadSession,
    policy: Annotated[str, Query(min_length=1, max_length=64, description="the policy")],
    month: Annotated[str, Query(description="the audited month, YYYY-MM")],
) -> StreamingResponse:
    """The same file as ``evenhand log bundle``: 404 ``no_snapshot`` when the month has no
    report snapshot, 422 ``not_sealed`` when its snapshot is not sealed yet. The bundle is
    written to a temporary file (in memory up to 8 MB) and then streamed."""
    return bundle_response(session, policy, Month.parse(month))


def bundle_response(session: Session, policy: str, month: Month) -> StreamingResponse:
    """The month bundle as a download (also served by the console)."""
    spool = tempfile.SpooledTemporaryFile(max_size=_SPOOL)  # noqa: SIM115 - closed by the stream
    try:
        export_month(session, policy, month, spool)  # type: ignore[arg-type]
    except BaseException:
        spool.close()
        raise
    spool.seek(0)

    def chunks() -> Iterator[bytes]:
        with spool:
            while data := spool.read(_CHUNK):
                yield data

    name = f"{policy}-{month}.ehb"
    return StreamingResponse(
        chunks(),
        media_type="application/x-ndjson",
        headers={"Content-Disposition": f'attachment; filename="{name}"'},
    )
