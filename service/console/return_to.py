"""Where a signed-out visitor goes back to after signing in (pure).

A console page opened without a live session redirects to ``/console/sign-in?next=PATH``;
the sign-in forms carry ``next`` along and a successful sign-in lands there. Only a path of
the console itself is followed (an open redirect would let a link on another site send a
person who just signed in anywhere): it must start with ``/console/``, hold no ``//``, no
backslash and no control character, and be at most :data:`MAX_LENGTH` characters. Anything
else lands on the policy list.
"""

from __future__ import annotations

from urllib.parse import quote

PREFIX = "/console"
MAX_LENGTH = 1024
_REFUSED_PARTS = ("//", "\\", "/sign-in", "/sign-out")


def safe_next(value: str) -> str | None:
    """``value`` if it is a console page to return to, else None."""
    if not value or len(value) > MAX_LENGTH or not value.startswith(PREFIX + "/"):
        return None
    if any(part in value for part in _REFUSED_PARTS):
        return None
    if any(ord(ch) < 0x20 or ord(ch) == 0x7F for ch in value):
        return None
    return value


def sign_in_location(method: str, path: str, query: str) -> str:
    """The sign-in page, remembering a GET request's page (a POST is not repeated)."""
    wanted = path + (f"?{query}" if query else "")
    if method != "GET" or safe_next(wanted) is None:
        return f"{PREFIX}/sign-in"
    return f"{PREFIX}/sign-in?next={quote(wanted, safe='/')}"


def after_sign_in(value: str) -> str:
    """Where a successful sign-in lands: the page asked for, or the policy list."""
    return safe_next(value) or f"{PREFIX}/policies"
