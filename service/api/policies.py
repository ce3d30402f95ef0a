"""Policy versions and their lifecycle (admin role). See docs/api.md."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Path, Query, Response

from service.api.deps import AdminKey, DbSession, PolicyReaderKey, ReadSession
from service.api.errors import error_responses
from service.api.fields import INT32_MAX, VersionPath
from service.api.policy_schemas import (
    ActivateBody,
    ChangeOut,
    DiffOut,
    EventOut,
    PolicySummary,
    RollbackBody,
    ShadowBody,
    ShadowOut,
    VersionDetail,
    VersionSummary,
)
from service.errors import NotFound
from service.policy.document import PolicyDocument
from service.store import lifecycle
from service.store import policies as repo

router = APIRouter(
    prefix="/v1/policies",
    tags=["policies"],
    responses=error_responses(400, 401, 403, 404, 409, 413, 422),
)

Name = Annotated[str, Path(pattern=r"^[a-z0-9][a-z0-9._-]{0,63}$", description="policy name")]
Version = VersionPath


@router.post("/{name}/versions", status_code=201, summary="Submit a new draft version")
def submit_version(
    name: Name, document: PolicyDocument, session: DbSession, key: AdminKey
) -> VersionSummary:
    view = lifecycle.submit(session, name, document, key.actor)
    return VersionSummary.of(view)


@router.get("", summary="All policies with their active and shadow versions")
def list_policies(session: ReadSession, _key: PolicyReaderKey) -> list[PolicySummary]:
    out = []
    for name in repo.policy_names(session):
        state = repo.get_state(session, name)
        out.append(
            PolicySummary(
                name=name,
                latest_version=repo.latest_version_number(session, name),
                active_version=None if state is None else state.active_version,
                shadow_version=None if state is None else state.shadow_version,
            )
        )
    return out


@router.get("/{name}/versions", summary="Every version of a policy")
def list_versions(name: Name, session: ReadSession, _key: PolicyReaderKey) -> list[VersionSummary]:
    views = repo.version_views(session, name)
    if not views:
        raise NotFound(f"no policy named {name!r}", code="unknown_policy")
    return [VersionSummary.of(v) for v in views]


@router.get("/{name}/versions/{version}", summary="One version with its document")
def get_version(
    name: Name, version: Version, session: ReadSession, _key: PolicyReaderKey
) -> VersionDetail:
    return VersionDetail.of(lifecycle.require_version(session, name, version))


@router.post(
    "/{name}/versions/{version}/approve",
    summary="Approve a draft (four-eyes: not by its author's key)",
)
def approve_version(
    name: Name, version: Version, session: DbSession, key: AdminKey
) -> VersionSummary:
    view = lifecycle.approve(session, name, version, key.actor)
    return VersionSummary.of(view)


@router.post("/{name}/activate", summary="Activate an approved version; the active one retires")
def activate(name: Name, body: ActivateBody, session: DbSession, key: AdminKey) -> VersionSummary:
    view = lifecycle.activate(
        session, name, body.version, key.actor, body.reason, expected_current=body.expected_current
    )
    return VersionSummary.of(view)


@router.post(
    "/{name}/rollback",
    summary="Re-activate the previously active version (or to_version); needs a reason",
)
def rollback(name: Name, body: RollbackBody, session: DbSession, key: AdminKey) -> VersionSummary:
    view = lifecycle.rollback(
        session,
        name,
        key.actor,
        body.reason,
        body.to_version,
        expected_current=body.expected_current,
    )
    return VersionSummary.of(view)


@router.get("/{name}/history", summary="Every lifecycle event, oldest first")
def history(name: Name, session: ReadSession, _key: PolicyReaderKey) -> list[EventOut]:
    return [EventOut.of(e) for e in lifecycle.history(session, name)]


@router.get("/{name}/diff", summary="What changed between two versions, rule by rule, in words")
def diff(
    name: Name,
    session: ReadSession,
    _key: PolicyReaderKey,
    from_version: Annotated[int, Query(alias="from", ge=1, le=INT32_MAX)],
    to_version: Annotated[int, Query(alias="to", ge=1, le=INT32_MAX)],
) -> DiffOut:
    changes = lifecycle.diff(session, name, from_version, to_version)
    summary = "\n".join(c.text for c in changes) or "no differences"
    return DiffOut(
        name=name,
        from_version=from_version,
        to_version=to_version,
        changes=[
            ChangeOut(section=c.section, before=c.before, after=c.after, text=c.text)
            for c in changes
        ],
        summary=summary,
    )


@router.get("/{name}/shadow", summary="The shadow version, if one is designated")
def get_shadow(name: Name, session: ReadSession, _key: PolicyReaderKey) -> ShadowOut:
    shadow = repo.shadow_view(session, name)
    if shadow is None:
        raise NotFound(f"policy {name!r} has no shadow version", code="no_shadow")
    return ShadowOut.of(shadow)


@router.put(
    "/{name}/shadow",
    summary="Evaluate an approved version beside the active one (recorded, not returned)",
)
def set_shadow(name: Name, body: ShadowBody, session: DbSession, key: AdminKey) -> ShadowOut:
    shadow = lifecycle.set_shadow(
        session, name, body.version, key.actor, expected_current=body.expected_current
    )
    return ShadowOut.of(shadow)


@router.delete("/{name}/shadow", status_code=204, summary="Stop shadow evaluation")
def clear_shadow(
    name: Name,
    session: DbSession,
    key: AdminKey,
    expected_current: Annotated[
        int,
        Query(
            ge=1,
            le=INT32_MAX,
            description="required: the shadow version you mean to end. A repeat after it "
            "ended is answered 204 again; another shadow version is a 409 current_changed",
        ),
    ],
) -> Response:
    lifecycle.clear_shadow(session, name, key.actor, expected_current=expected_current)
    return Response(status_code=204)
