"""Console passwords: scrypt (RFC 7914) from the standard library, pure functions, no I/O.

Parameters: N = 2**14, r = 8, p = 1 (the cost RFC 7914 section 2 gives for interactive
logins, common practice), a random 16-byte salt per password, a 64-byte result. scrypt with
these parameters uses 128 * r * N bytes = 16 MiB of memory per check.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass

N = 2**14
R = 8
P = 1
SALT_BYTES = 16
HASH_BYTES = 64
MIN_LENGTH = 12
MAX_LENGTH = 1024
MAX_MEMORY = 64 * 1024 * 1024


@dataclass(frozen=True, slots=True)
class Hashed:
    salt: bytes
    hash: bytes
    n: int
    r: int
    p: int


def derive(password: str, salt: bytes, n: int = N, r: int = R, p: int = P) -> bytes:
    """scrypt(password as UTF-8, salt, N, r, p), 64 bytes."""
    return hashlib.scrypt(
        password.encode("utf-8"), salt=salt, n=n, r=r, p=p, maxmem=MAX_MEMORY, dklen=HASH_BYTES
    )


def hash_password(password: str) -> Hashed:
    salt = secrets.token_bytes(SALT_BYTES)
    return Hashed(salt, derive(password, salt), N, R, P)


def verify(password: str, stored: Hashed) -> bool:
    """Whether ``password`` gives ``stored.hash`` (constant-time comparison)."""
    return hmac.compare_digest(
        derive(password, stored.salt, stored.n, stored.r, stored.p), stored.hash
    )


_DUMMY = Hashed(bytes(SALT_BYTES), bytes(HASH_BYTES), N, R, P)


def verify_or_spend(password: str, stored: Hashed | None) -> bool:
    """:func:`verify`, or (no such person) the same work for nothing, so an unknown name
    takes as long to refuse as a wrong password."""
    if stored is None:
        verify(password, _DUMMY)
        return False
    return verify(password, stored)


def weakness(password: str) -> str | None:
    """Why a new password is refused, or None."""
    if len(password) < MIN_LENGTH:
        return f"a password has at least {MIN_LENGTH} characters"
    if len(password) > MAX_LENGTH:
        return f"a password has at most {MAX_LENGTH} characters"
    return None
