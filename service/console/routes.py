"""The console's pages: sign-in and sign-out, policies (admins act, auditors read) and the
confirmed lifecycle actions (the reports are in ``report_pages``). See docs/console.md."""

from __future__ import annotations

import re
import secrets
from importlib.resources import files
from typing import Annotated

from fastapi import APIRouter, Depends, Query, Request, Response

from service.console import actions, drafts
from service.console.deps import PostedForm, Who
from service.console.deps import read_session as _read_session
from service.console.deps import write_session as _write_session
from service.console.return_to import after_sign_in, safe_next
from service.console.rule_view import compare_chart, describe_rule, rule_chart
from service.console.sessions import ConsoleSession
from service.console.web import (
    CONSOLE_ROLES,
    PREFIX,
    SESSION_COOKIE,
    SIGN_IN_COOKIE,
    ConsoleRoute,
    Form,
    Name,
    Version,
    check_csrf,
    clear_cookie,
    redirect,
    render,
    require_admin,
    sessions_of,
    set_cookie,
)
from service.errors import NotFound, ServiceError, Unprocessable
from service.policy.document import DEFAULT_RULE_KEY, PolicyDocument, content_hash
from service.store import keys, lifecycle
from service.store import policies as repo

router = APIRouter(prefix=PREFIX, route_class=ConsoleRoute, include_in_schema=False)


_STATIC = files("service.console").joinpath("static")
_STATIC_TYPES = {"console.css": "text/css", "icon.svg": "image/svg+xml"}


# --- sign-in, sign-out, stylesheet -------------------------------------------------------


@router.get("/static/{file}")
def static_file(file: str) -> Response:
    media_type = _STATIC_TYPES.get(file)
    if media_type is None:
        raise NotFound(f"no static file {file!r}")
    return Response(
        _STATIC.joinpath(file).read_text(encoding="utf-8"),
        media_type=media_type,
        headers={"Cache-Control": "max-age=3600"},
    )


@router.get("")
def home(request: Request) -> Response:
    session_id = request.cookies.get(SESSION_COOKIE)
    signed_in = bool(session_id) and sessions_of(request).get(session_id or "") is not None
    return redirect(f"{PREFIX}/policies" if signed_in else f"{PREFIX}/sign-in")


def _sign_in_page(
    request: Request, status_code: int = 200, message: str | None = None, next_page: str = ""
) -> Response:
    token = secrets.token_urlsafe(32)
    response = render(
        request,
        "sign_in.html",
        status_code,
        title="Sign in",
        csrf=token,
        message=message,
        next_page=safe_next(next_page) or "",
    )
    set_cookie(request, response, SIGN_IN_COOKIE, token)
    return response


@router.get("/sign-in")
def sign_in_form(request: Request, next: str = "") -> Response:
    return _sign_in_page(request, next_page=next)


@router.post("/sign-in")
def sign_in(request: Request, form: PostedForm) -> Response:
    # The sign-in form has no session yet: its CSRF token is the one set in its own cookie.
    check_csrf(form, request.cookies.get(SIGN_IN_COOKIE))
    token = form.get("api_key")
    with _read_session(request) as session:
        key = keys.authenticate(session, token) if keys.well_formed(token) else None
        found = None if key is None else (key.id, key.name, key.role)
        session.rollback()
    if found is None:
        return _sign_in_page(request, 401, "Unknown or revoked API key.", form.get("next"))
    return _start_session(request, *found, form.get("next"))


@router.post("/sign-in/password")
def sign_in_with_password(request: Request, form: PostedForm) -> Response:
    """Sign in as a person with the password an admin set: the session is the key's the
    person stands for (its role; actions attributed to its credential)."""
    from service.console import attempts, passwords
    from service.store import console_passwords

    check_csrf(form, request.cookies.get(SIGN_IN_COOKIE))
    person = form.get("person")[:64]
    password = form.fields.get("password", "")[: passwords.MAX_LENGTH]
    counted = attempts.count(request, person)  # 429 past the limit, before any scrypt work
    with _read_session(request) as session:
        row = console_passwords.find(session, person) if person else None
        stored = None if row is None else row.hashed()
        ok = passwords.verify_or_spend(password, stored)
        key = None if row is None or not ok else console_passwords.live_key(session, row.key_id)
        found = None if key is None else (key.id, key.name, key.role)
        session.rollback()
    if found is None:
        return _sign_in_page(
            request, 401, "Unknown name, wrong password or a revoked key.", form.get("next")
        )
    attempts.succeeded(request, counted)
    return _start_session(request, *found, form.get("next"))


def _start_session(
    request: Request, key_id: int, name: str, role: str, next_page: str = ""
) -> Response:
    if role not in CONSOLE_ROLES:
        return _sign_in_page(
            request, 403, f"A {role!r} key cannot sign in: the console is for admin and audit keys."
        )
    previous = request.cookies.get(SESSION_COOKIE)
    if previous:  # signing in again (perhaps as someone else) ends the earlier session
        sessions_of(request).end(previous)
    session_id = sessions_of(request).create(key_id, name, role)
    response = redirect(after_sign_in(next_page))
    set_cookie(request, response, SESSION_COOKIE, session_id)
    clear_cookie(request, response, SIGN_IN_COOKIE)
    return response


@router.post("/sign-out")
def sign_out(request: Request, who: Who, form: PostedForm) -> Response:
    check_csrf(form, who.csrf)
    sessions_of(request).end(request.cookies.get(SESSION_COOKIE, ""))
    response = redirect(f"{PREFIX}/sign-in")
    clear_cookie(request, response, SESSION_COOKIE)
    return response


# --- policies ------------------------------------------------------------------------------


@router.get("/policies")
def policy_list(request: Request, who: Who) -> Response:
    with _read_session(request) as session:
        rows = []
        for name in repo.policy_names(session):
            state = repo.get_state(session, name)
            rows.append(
                {
                    "name": name,
                    "latest": repo.latest_version_number(session, name),
                    "active": None if state is None else state.active_version,
                    "shadow": None if state is None else state.shadow_version,
                }
            )
    return render(request, "policies.html", who=who, title="Policies", policies=rows)


@router.get("/policies/{name}")
def policy_page(request: Request, who: Who, name: Name) -> Response:
    with _read_session(request) as session:
        views = repo.version_views(session, name)
        if not views:
            raise NotFound(f"no policy named {name!r}", code="unknown_policy")
        state = repo.get_state(session, name)
        events = lifecycle.history(session, name)
        page = actions.policy_overview(name, views, state, events)
    return render(request, "policy.html", who=who, title=name, page=page)


@router.get("/policies/{name}/versions/{version}")
def version_page(request: Request, who: Who, name: Name, version: Version) -> Response:
    with _read_session(request) as session:
        view = lifecycle.require_version(session, name, version)
        state = repo.get_state(session, name)
        latest = repo.latest_version_number(session, name) or version
    active_version = None if state is None else state.active_version
    # "compare with vN": the previous version, the active one and the latest one.
    compare = sorted(
        {v for v in (version - 1, active_version, latest) if v is not None and 1 <= v != version}
    )
    document = PolicyDocument.model_validate(view.row.document)
    score_range = (float(document.score_range[0]), float(document.score_range[1]))
    rules = [
        {
            "group": group,
            "sentence": describe_rule(rule),
            "chart": rule_chart(rule, score_range),
        }
        for group, rule in document.rules.items()
    ]
    default = document.groups.fallback.default
    if default is not None:
        rules.append(
            {
                "group": "fallback (default rule)",
                "sentence": describe_rule(default),
                "chart": rule_chart(default, score_range),
            }
        )
    return render(
        request,
        "version.html",
        who=who,
        title=f"{name} v{version}",
        name=name,
        view=view,
        document=document,
        rules=rules,
        compare=compare,
        active=active_version,
        shadow=None if state is None else state.shadow_version,
    )


@router.get("/policies/{name}/diff")
def diff_page(
    request: Request,
    who: Who,
    name: Name,
    from_version: Annotated[int, Query(alias="from", ge=1, le=2_147_483_647)],
    to_version: Annotated[int, Query(alias="to", ge=1, le=2_147_483_647)],
) -> Response:
    """Two versions in the same terms as the version page: per rule, each version's sentence
    and both on one chart; the changed settings in words (the API's diff, ``policy_diff``)."""
    with _read_session(request) as session:
        a = lifecycle.require_version(session, name, from_version)
        b = lifecycle.require_version(session, name, to_version)
        changes = lifecycle.diff(session, name, from_version, to_version)
    before = PolicyDocument.model_validate(a.row.document)
    after = PolicyDocument.model_validate(b.row.document)
    score_range = (
        float(min(before.score_range[0], after.score_range[0])),
        float(max(before.score_range[1], after.score_range[1])),
    )
    labels = (f"v{from_version}", f"v{to_version}")
    keys_in_order = list(dict.fromkeys([*before.rules, *after.rules]))
    pairs = [(key, before.rules.get(key), after.rules.get(key)) for key in keys_in_order]
    default_a, default_b = before.groups.fallback.default, after.groups.fallback.default
    if default_a is not None or default_b is not None:
        pairs.append((DEFAULT_RULE_KEY, default_a, default_b))
    rules = [
        {
            "group": "fallback (default rule)" if key == DEFAULT_RULE_KEY else key,
            "before": None if ra is None else describe_rule(ra),
            "after": None if rb is None else describe_rule(rb),
            "changed": (None if ra is None else ra.describe())
            != (None if rb is None else rb.describe()),
            "chart": compare_chart(ra, rb, score_range, labels),
        }
        for key, ra, rb in pairs
    ]
    settings = [c for c in changes if not c.section.startswith("rules[")]
    return render(
        request,
        "diff.html",
        who=who,
        title=f"{name}: v{from_version} and v{to_version}",
        name=name,
        a=from_version,
        b=to_version,
        rules=rules,
        settings=settings,
        same=not changes,
    )


# --- lifecycle actions (admin), each behind a confirmation page -----------------------------


@router.get("/policies/{name}/confirm/{action}")
def confirm_page(
    request: Request, who: Who, name: Name, action: str, version: int | None = None
) -> Response:
    require_admin(who)
    with _read_session(request) as session:
        plan = actions.plan(session, name, action, version)
    return render(request, "confirm.html", who=who, title=plan.title, plan=plan, error=None)


@router.post("/policies/{name}/confirm/{action}")
def perform(request: Request, who: Who, form: PostedForm, name: Name, action: str) -> Response:
    check_csrf(form, who.csrf)
    require_admin(who)
    actor = keys.Actor(who.key_id, who.key_name)
    try:
        with _write_session(request) as session:
            actions.perform(session, name, action, form, actor)
            session.commit()
    except ServiceError as exc:
        # Shown on the confirmation page again, as read now, with the service's message.
        with _read_session(request) as session:
            try:
                plan = actions.plan(session, name, action, form.optional_int("version"))
            except ServiceError:
                raise exc from None
        return render(
            request,
            "confirm.html",
            status_code=exc.status_code,
            who=who,
            title=plan.title,
            plan=plan,
            error=exc,
        )
    return redirect(f"{PREFIX}/policies/{name}")


# --- a new draft (admin): paste or upload, confirm, submit ----------------------------------

NAME_PATTERN = re.compile(r"^[a-z0-9][a-z0-9._-]{0,63}$")


async def read_draft_form(request: Request) -> Form:
    """A draft's form (a dependency): URL-encoded or multipart (a file upload), up to the
    API's own body limit (``EVENHAND_MAX_BODY_BYTES``) since a document may be large."""
    body = await request.body()
    if len(body) > request.app.state.settings.max_body_bytes:
        raise Unprocessable("the form is larger than the service accepts")
    return Form(drafts.form_fields(request.headers.get("content-type", ""), body))


DraftForm = Annotated[Form, Depends(read_draft_form)]


def _draft_form(
    request: Request,
    who: ConsoleSession,
    name: str,
    text: str,
    error: ServiceError | None = None,
) -> Response:
    return render(
        request,
        "draft_form.html",
        200 if error is None else error.status_code,
        who=who,
        title="Submit a draft",
        name=name,
        text=text,
        error=error,
    )


@router.get("/drafts/new")
def draft_form(request: Request, who: Who, name: str = "") -> Response:
    require_admin(who)
    return _draft_form(request, who, name[:64], "")


@router.post("/drafts")
def draft_submit(request: Request, who: Who, form: DraftForm) -> Response:
    """``step=check``: validate (the API's checks) and show the confirmation page;
    ``step=confirm``: store the draft, attributed to the signed-in key."""
    check_csrf(form, who.csrf)
    require_admin(who)
    name = form.get("name")
    text = drafts.document_text(form.fields)
    try:
        if not NAME_PATTERN.match(name):
            raise Unprocessable(
                "the policy name is 1 to 64 characters: lower-case letters, digits, '.', '_' "
                "and '-', starting with a letter or digit",
                code="invalid_name",
                field="name",
            )
        document = lifecycle.check_submission(name, drafts.read_json(text))
    except ServiceError as exc:
        return _draft_form(request, who, name, text, exc)
    digest = content_hash(document)
    if form.get("step") != "confirm":
        with _read_session(request) as session:
            latest = repo.latest_version_number(session, name)
        return render(
            request,
            "draft_confirm.html",
            who=who,
            title=f"Submit a draft of {name}",
            name=name,
            text=text,
            digest=digest,
            next_version=(latest or 0) + 1,
            summary=drafts.summarise(document),
        )
    if form.get("content_hash") != digest:
        return _draft_form(
            request,
            who,
            name,
            text,
            Unprocessable(
                "the document is not the one the confirmation page showed: check it again",
                code="document_changed",
                field="document",
            ),
        )
    actor = keys.Actor(who.key_id, who.key_name)
    with _write_session(request) as session:
        view = lifecycle.submit(session, name, document, actor)
        version = view.row.version
        session.commit()
    return redirect(f"{PREFIX}/policies/{name}/versions/{version}")
