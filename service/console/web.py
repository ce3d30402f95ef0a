"""The console's plumbing: templates, security headers, cookies, the signed-in check, forms
and CSRF.

Every console response (pages, redirects, refusals, the stylesheet) passes through
:class:`ConsoleRoute`, which renders service refusals as pages and adds the security headers.
"""

from __future__ import annotations

from collections.abc import Callable, Coroutine
from dataclasses import dataclass
from typing import Annotated, Any
from urllib.parse import parse_qs

from fastapi import Path, Request, Response
from fastapi.exceptions import RequestValidationError
from fastapi.responses import HTMLResponse, RedirectResponse
from fastapi.routing import APIRoute
from jinja2 import Environment, PackageLoader, StrictUndefined, select_autoescape

from service.console.return_to import sign_in_location
from service.console.sessions import ConsoleSession, SessionStore, same_token
from service.errors import Forbidden, ServiceError, TooManyRequests, Unprocessable
from service.settings import Settings

# Path parameters of the console's pages, checked as the API checks them.
Name = Annotated[str, Path(pattern=r"^[a-z0-9][a-z0-9._-]{0,63}$")]
Version = Annotated[int, Path(ge=1, le=2_147_483_647)]
Month = Annotated[str, Path(pattern=r"^\d{4}-(0[1-9]|1[0-2])$")]

PREFIX = "/console"
SESSION_COOKIE = "evenhand_console"
SIGN_IN_COOKIE = "evenhand_console_sign_in"
CONSOLE_ROLES = ("admin", "audit")
MAX_FORM_BYTES = 16 * 1024

CONTENT_SECURITY_POLICY = (
    "default-src 'none'; style-src 'self'; img-src 'self'; form-action 'self'; "
    "frame-ancestors 'none'; base-uri 'none'"
)
SECURITY_HEADERS = {
    "Content-Security-Policy": CONTENT_SECURITY_POLICY,
    "X-Frame-Options": "DENY",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-store",
}

TEMPLATES = Environment(
    loader=PackageLoader("service.console", "templates"),
    autoescape=select_autoescape(["html"]),
    undefined=StrictUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
)


class SignInRequired(Exception):
    """No live console session: the request is sent to the sign-in page."""


def sessions_of(request: Request) -> SessionStore:
    store: SessionStore | None = getattr(request.app.state, "console_sessions", None)
    if store is None:  # first console request of this app
        settings: Settings = request.app.state.settings
        store = SessionStore(
            request.app.state.session_factory,
            settings.console_idle_minutes * 60,
            settings.console_max_hours * 3600,
        )
        request.app.state.console_sessions = store
    return store


def secure_cookies(request: Request) -> bool:
    settings: Settings = request.app.state.settings
    return settings.console_secure_cookie or request.url.scheme == "https"


def set_cookie(request: Request, response: Response, name: str, value: str) -> None:
    response.set_cookie(
        name,
        value,
        path=PREFIX,
        httponly=True,
        samesite="strict",
        secure=secure_cookies(request),
    )


def clear_cookie(request: Request, response: Response, name: str) -> None:
    response.delete_cookie(
        name, path=PREFIX, httponly=True, samesite="strict", secure=secure_cookies(request)
    )


def render(
    request: Request,
    template: str,
    status_code: int = 200,
    who: ConsoleSession | None = None,
    **context: Any,
) -> HTMLResponse:
    page = TEMPLATES.get_template(template).render(
        prefix=PREFIX, who=who, path=request.url.path, **context
    )
    return HTMLResponse(page, status_code=status_code)


def redirect(url: str) -> RedirectResponse:
    return RedirectResponse(url, status_code=303)


def current_session(request: Request) -> ConsoleSession:
    """The signed-in session (a dependency): the cookie's session, live, of a live key.
    A sync dependency: FastAPI runs it in the thread pool, off the event loop."""
    session_id = request.cookies.get(SESSION_COOKIE)
    if not session_id:
        raise SignInRequired
    found = sessions_of(request).get(session_id)
    if found is None:  # unknown, expired, signed out, or its key revoked since sign-in
        raise SignInRequired
    return found


def require_admin(who: ConsoleSession) -> None:
    if who.role != "admin":
        raise Forbidden(f"a {who.role!r} key may not do this: it needs an admin key")


@dataclass(frozen=True, slots=True)
class Form:
    fields: dict[str, str]

    def get(self, name: str) -> str:
        return self.fields.get(name, "").strip()

    def optional_int(self, name: str) -> int | None:
        text = self.get(name)
        if text in ("", "none"):
            return None
        if not text.isdigit() or len(text) > 9:
            raise Unprocessable(f"{name} must be a version number or 'none'", field=name)
        return int(text)


async def read_form(request: Request) -> Form:
    """The URL-encoded form of a POST (a dependency); refuses anything else."""
    kind = request.headers.get("content-type", "").split(";")[0].strip().lower()
    body = await request.body()
    if not body:
        return Form({})  # an empty form: refused by the CSRF check
    if kind != "application/x-www-form-urlencoded":
        raise Unprocessable("the console accepts URL-encoded forms only")
    if len(body) > MAX_FORM_BYTES:
        raise Unprocessable(f"a console form holds at most {MAX_FORM_BYTES} bytes")
    try:
        parsed = parse_qs(body.decode("utf-8"), keep_blank_values=True, strict_parsing=False)
    except UnicodeDecodeError:
        raise Unprocessable("the form is not UTF-8") from None
    return Form({k: v[0] for k, v in parsed.items() if v})


def check_csrf(form: Form, expected: str | None) -> None:
    """403 unless the form's ``csrf`` field equals ``expected`` (constant-time)."""
    sent = form.get("csrf")
    if not expected or not sent or not same_token(sent, expected):
        raise Forbidden(
            "the form's CSRF token is missing or wrong: reload the page and submit it again",
            code="csrf_failed",
        )


def _error_page(request: Request, exc: ServiceError) -> Response:
    return render(
        request,
        "error.html",
        status_code=exc.status_code,
        title="Refused",
        code=exc.code,
        message=exc.message,
    )


class ConsoleRoute(APIRoute):
    """Console routes: refusals become pages; every response gets the security headers."""

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        handler = super().get_route_handler()

        async def handle(request: Request) -> Response:
            try:
                response = await handler(request)
            except SignInRequired:
                response = redirect(
                    sign_in_location(request.method, request.url.path, request.url.query)
                )
            except ServiceError as exc:
                response = _error_page(request, exc)
                if isinstance(exc, TooManyRequests):
                    response.headers["Retry-After"] = str(exc.retry_after)
            except RequestValidationError:
                response = _error_page(request, ServiceError("no such page", code="not_found"))
                response.status_code = 404
            for header, value in SECURITY_HEADERS.items():
                response.headers.setdefault(header, value)
            return response

        return handle
