"""The console's People page (admin): the names that can sign in with a password, and
setting one. See docs/console.md, "With a name and password"."""

from __future__ import annotations

import re

from fastapi import APIRouter, Request, Response

from service.console.deps import PostedForm, Who, read_session, write_session
from service.console.sessions import ConsoleSession
from service.console.web import (
    CONSOLE_ROLES,
    PREFIX,
    SESSION_COOKIE,
    ConsoleRoute,
    check_csrf,
    render,
    require_admin,
    sessions_of,
)
from service.store import keys
from service.store.models import utcnow

router = APIRouter(prefix=PREFIX, route_class=ConsoleRoute, include_in_schema=False)

NAME_PATTERN = re.compile(r"^[a-z0-9][a-z0-9._-]{0,63}$")


def _people_page(
    request: Request,
    who: ConsoleSession,
    status_code: int = 200,
    message: str | None = None,
    done: str | None = None,
) -> Response:
    from service.store import console_passwords

    with read_session(request) as session:
        people = [
            {"person": row.person, "key": key_name, "set_by": row.set_by, "set_at": row.set_at}
            for row, key_name in console_passwords.people(session)
        ]
    return render(
        request,
        "people.html",
        status_code,
        who=who,
        title="People",
        people=people,
        message=message,
        done=done,
    )


@router.get("/people")
def people_page(request: Request, who: Who) -> Response:
    require_admin(who)
    return _people_page(request, who)


@router.post("/people")
def set_password(request: Request, who: Who, form: PostedForm) -> Response:
    """Bind a person to an API key (whose token the admin types in, so no one can stand for
    a credential they do not hold) with a password (scrypt, service/console/passwords.py)."""
    from service.console import passwords
    from service.store import console_passwords

    check_csrf(form, who.csrf)
    require_admin(who)
    person = form.get("person")
    password = form.fields.get("password", "")
    if not NAME_PATTERN.match(person):
        return _people_page(
            request, who, 422, "A name is 1 to 64 lower-case letters, digits, '.', '_' or '-'."
        )
    weak = passwords.weakness(password)
    if weak is not None:
        return _people_page(request, who, 422, f"Refused: {weak}.")
    if password != form.fields.get("password_again", ""):
        return _people_page(request, who, 422, "Refused: the two passwords differ.")
    token = form.get("api_key")
    with write_session(request) as session:
        key = keys.authenticate(session, token) if keys.well_formed(token) else None
        if key is None or key.role not in CONSOLE_ROLES:
            session.rollback()
            return _people_page(
                request, who, 422, "Refused: the API key is not a live admin or audit key."
            )
        key_name = key.name
        console_passwords.set_password(
            session, person, key, passwords.hash_password(password), who.key_name, utcnow()
        )
        session.commit()
    return _people_page(
        request, who, done=f"{person} can now sign in with a password, as key {key_name}."
    )


# --- a signed-in person's own password ---------------------------------------------------------


def _password_page(
    request: Request,
    who: ConsoleSession,
    status_code: int = 200,
    message: str | None = None,
    done: str | None = None,
) -> Response:
    from service.store import console_passwords

    with read_session(request) as session:
        row = console_passwords.of_key(session, who.key_id)
        person = None if row is None else row.person
    return render(
        request,
        "password.html",
        status_code,
        who=who,
        title="Your password",
        person=person,
        message=message,
        done=done,
    )


@router.get("/password")
def password_page(request: Request, who: Who) -> Response:
    return _password_page(request, who)


@router.post("/password")
def change_password(request: Request, who: Who, form: PostedForm) -> Response:
    """The signed-in person changes their own password: the old one is required (and counted
    against the attempt limit like a sign-in), the new one follows the same rules as on the
    People page. The person is the one bound to the signed-in key."""
    from service.console import attempts, passwords
    from service.store import console_passwords

    check_csrf(form, who.csrf)
    old = form.fields.get("old_password", "")[: passwords.MAX_LENGTH]
    new = form.fields.get("password", "")
    with read_session(request) as session:
        row = console_passwords.of_key(session, who.key_id)
        found = None if row is None else (row.person, row.hashed())
    if found is None:
        return _password_page(
            request, who, 404, f"No password is set for key {who.key_name}: an admin sets one."
        )
    person, stored = found
    weak = passwords.weakness(new)
    if weak is not None:
        return _password_page(request, who, 422, f"Refused: {weak}.")
    if new != form.fields.get("password_again", ""):
        return _password_page(request, who, 422, "Refused: the two new passwords differ.")
    counted = attempts.count(request, person)  # 429 past the limit, before any scrypt work
    if not passwords.verify(old, stored):
        return _password_page(request, who, 401, "Refused: the old password is wrong.")
    attempts.succeeded(request, counted)
    with write_session(request) as session:
        console_passwords.change_password(
            session, person, passwords.hash_password(new), who.key_name, utcnow()
        )
        session.commit()
    # Whoever else is signed in as this key (perhaps with the old password) is signed out.
    ended = sessions_of(request).end_others(who.key_id, request.cookies.get(SESSION_COOKIE, ""))
    others = f" {ended} other session(s) of key {who.key_name} ended." if ended else ""
    return _password_page(request, who, done=f"The password of {person} is changed.{others}")
