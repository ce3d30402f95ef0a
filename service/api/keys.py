"""API keys (admin): list them and revoke one. Keys are created by the operator with the CLI
(``evenhand keys create``): no route takes or hands out a token. See docs/api.md."""

from __future__ import annotations

from datetime import datetime
from typing import Annotated

from fastapi import APIRouter, BackgroundTasks, Path, Request
from pydantic import BaseModel, ConfigDict, Field

from service.api.deps import AdminKey, DbSession, KeyCache, ReadSession
from service.api.errors import error_responses
from service.api.fields import Reason
from service.policy.attributes import TEXT_PATTERN
from service.store import keys
from service.store.keys import KeyView

router = APIRouter(
    prefix="/v1/keys",
    tags=["keys"],
    responses=error_responses(400, 401, 403, 404, 409, 413, 422),
)

KeyName = Annotated[
    str, Path(min_length=1, max_length=64, pattern=TEXT_PATTERN, description="key name")
]


class KeyOut(BaseModel):
    """A key as listed: never its token nor its hash."""

    name: str
    role: str
    created_at: datetime
    created_by: str | None = Field(description="the operator or key that created it")
    revoked: bool
    revoked_at: datetime | None
    revoked_by: str | None = Field(description="the admin key (or operator) that revoked it")
    revoke_reason: str | None

    @classmethod
    def of(cls, view: KeyView) -> KeyOut:
        return cls(
            name=view.name,
            role=view.role,
            created_at=view.created_at,
            created_by=view.created_by,
            revoked=view.revoked,
            revoked_at=view.revoked_at,
            revoked_by=view.revoked_by,
            revoke_reason=view.revoke_reason,
        )


class RevokeBody(BaseModel):
    model_config = ConfigDict(extra="forbid")

    reason: Reason = Field(description="why; kept with the revocation")


@router.get("", summary="Every API key: name, role, created, revoked (never tokens or hashes)")
def list_keys(session: ReadSession, _key: AdminKey) -> list[KeyOut]:
    return [KeyOut.of(v) for v in keys.list_keys(session)]


@router.post(
    "/{name}/revoke",
    summary="Revoke a key (not the last live admin key); a repeat answers as the first time",
)
def revoke_key(
    name: KeyName,
    body: RevokeBody,
    request: Request,
    tasks: BackgroundTasks,
    session: DbSession,
    key: AdminKey,
) -> KeyOut:
    view = keys.revoke_key(session, name, body.reason, key.actor, keep_an_admin=True)
    # This process stops trusting the key at once; others within EVENHAND_AUTH_CACHE_SECONDS.
    # Cleared now and again once the response is sent (after the commit), so a request that
    # read the key as live in between does not keep it cached.
    cache: KeyCache | None = getattr(request.app.state, "key_cache", None)
    if cache is not None:
        cache.clear()
        tasks.add_task(cache.clear)
    return KeyOut.of(view)
