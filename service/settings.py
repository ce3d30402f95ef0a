"""Service settings, read from ``EVENHAND_*`` environment variables (pydantic-settings)."""

from __future__ import annotations

import logging
from datetime import timedelta
from typing import Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import Field, SecretStr, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from service.log.key_errors import SigningKeyError

MIN_RETENTION_MONTHS = 6
"""The shortest retention: EU AI Act (Regulation (EU) 2024/1689) Art. 26(6) asks deployers of
high-risk systems to keep the logs the system generates automatically for at least six
months."""

MIN_DRAW_SECRET_BYTES = 32
"""Shortest draw secret, in bytes of its UTF-8 encoding: 256 bits, HMAC-SHA256's output size
(RFC 2104, section 3, strongly discourages HMAC keys shorter than the hash output)."""

log = logging.getLogger("evenhand.settings")


class DrawSecretError(RuntimeError):
    """The draw secret cannot be used: scoring and ``serve`` refuse to start."""


class MissingDrawSecret(DrawSecretError):
    """Raised when scoring is attempted without ``EVENHAND_DRAW_SECRET``."""


class SigningKeyUnavailable(SigningKeyError):
    """The signing key file is set but cannot be read."""


class ShortDrawSecret(DrawSecretError):
    """Raised when ``EVENHAND_DRAW_SECRET`` is shorter than ``MIN_DRAW_SECRET_BYTES``."""


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="EVENHAND_", extra="ignore")

    database_url: str = Field(
        default="sqlite:///./evenhand.db",
        description="SQLAlchemy URL: a SQLite file (WAL mode) or postgresql+psycopg://...",
    )
    draw_secret: SecretStr | None = Field(
        default=None,
        description=f"HMAC key of the keyed draw; required to serve or score, at least "
        f"{MIN_DRAW_SECRET_BYTES} bytes (UTF-8), e.g. the 64 hex characters of "
        "`openssl rand -hex 32`",
    )
    demo_mode: bool = Field(
        default=False,
        description="set by `evenhand demo` for its own server: accepts a short draw secret "
        "(with a warning). Never for real decisions.",
    )
    host: str = "127.0.0.1"
    port: int = Field(default=8000, ge=1, le=65535)
    workers: int = Field(default=1, ge=1)
    seal_interval_seconds: float = Field(default=5.0, gt=0)
    timezone: str = Field(default="UTC", description="IANA zone that audit months are cut in")
    max_batch_items: int = Field(default=10_000, ge=1, le=100_000)
    max_body_bytes: int = Field(default=8 * 1024 * 1024, ge=1024)
    sqlite_synchronous: Literal["OFF", "NORMAL", "FULL", "EXTRA"] = Field(
        default="FULL", description="SQLite PRAGMA synchronous; FULL makes every commit durable"
    )
    sqlite_busy_timeout_ms: int = Field(default=30_000, ge=0)
    clock_skew_seconds: float = Field(
        default=300.0,
        ge=0,
        le=86_400,
        description="how far a sender's clock may differ from the server's: an outcome or "
        "final decision may be dated this much before its recommendation's issue or after now",
    )
    auth_cache_seconds: float = Field(
        default=1.0,
        ge=0,
        description="how long a process trusts a key it has just checked (0: every request "
        "asks the database); a revoked key is refused at the latest this long after",
    )

    signing_key: SecretStr | None = Field(
        default=None,
        description="Ed25519 key that signs the log's tree heads: a 32-byte seed in hex or "
        "base64, or a PEM private key (`evenhand log keygen` writes one). Keep it outside "
        "the database; required to seal, except in demo mode",
    )
    signing_key_file: str | None = Field(
        default=None, description="a file holding the signing key (instead of signing_key)"
    )
    trusted_public_keys: str = Field(
        default="",
        description="comma-separated raw Ed25519 public keys (64 hex digits) of earlier signing "
        "keys: heads they signed still verify after a rotation",
    )
    head_mirror: str | None = Field(
        default=None,
        description="a file every signed tree head is appended to (JSON lines), kept apart from "
        "the database: `evenhand log verify --heads FILE` compares the log with it",
    )

    metrics_access: Literal["key", "open"] = Field(
        default="key",
        description="who may read GET /metrics: `key` (a key with the audit or the admin role, "
        "sent by Prometheus as a bearer token) or `open` (anyone who can reach the port: only "
        "on a private network)",
    )
    access_log: bool = Field(
        default=True,
        description="one log line per request (method, route template, status, duration, "
        "request id); never the query string, headers or body",
    )
    log_format: Literal["json", "text"] = Field(
        default="json", description="`evenhand serve`'s log lines: JSON objects or plain text"
    )

    retention_months: int = Field(
        default=MIN_RETENTION_MONTHS,
        description="whole months the log's personal-data records are kept before "
        "`evenhand log purge` may delete them; at least 6 (EU AI Act Art. 26(6))",
    )

    console_idle_minutes: float = Field(
        default=30.0,
        gt=0,
        le=24 * 60,
        description="a console session ends after this many minutes without a request",
    )
    console_max_hours: float = Field(
        default=8.0,
        gt=0,
        le=7 * 24,
        description="a console session ends this many hours after sign-in, however active",
    )
    console_sign_in_limit: int = Field(
        default=10,
        ge=1,
        le=10_000,
        description="failed password sign-ins allowed per name and per client address in a "
        "window; the next attempt answers 429 until the window ends",
    )
    console_sign_in_window_minutes: float = Field(
        default=15.0,
        gt=0,
        le=24 * 60,
        description="the fixed window of the password sign-in limit, from its first failure",
    )
    console_secure_cookie: bool = Field(
        default=False,
        description="always mark the console's cookies Secure (set it behind a TLS-terminating "
        "proxy; requests that arrive over HTTPS get Secure cookies anyway)",
    )

    @field_validator("retention_months")
    @classmethod
    def _long_enough(cls, value: int) -> int:
        if value < MIN_RETENTION_MONTHS:
            raise ValueError(
                f"EVENHAND_RETENTION_MONTHS is {value}; it must be at least "
                f"{MIN_RETENTION_MONTHS}: six months is the minimum retention of the logs a "
                "high-risk AI system generates automatically for its deployers (EU AI Act, "
                "Regulation (EU) 2024/1689, Art. 26(6))"
            )
        return value

    @field_validator("timezone")
    @classmethod
    def _known_zone(cls, value: str) -> str:
        try:
            ZoneInfo(value)
        except (ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"unknown time zone {value!r} (use an IANA name, e.g. UTC)") from None
        return value

    @property
    def clock_skew(self) -> timedelta:
        return timedelta(seconds=self.clock_skew_seconds)

    def draw_key(self) -> bytes:
        """The draw secret as bytes (UTF-8); refuses clearly when it is not set or shorter
        than ``MIN_DRAW_SECRET_BYTES`` (allowed, with a warning, in demo mode only)."""
        if self.draw_secret is None or not self.draw_secret.get_secret_value():
            raise MissingDrawSecret(
                "EVENHAND_DRAW_SECRET is not set: the keyed draw needs a secret. Set it to a "
                "long random value (e.g. `openssl rand -hex 32`) and keep it: changing it "
                "changes every future draw."
            )
        key = self.draw_secret.get_secret_value().encode("utf-8")
        if len(key) < MIN_DRAW_SECRET_BYTES:
            message = (
                f"EVENHAND_DRAW_SECRET is {len(key)} bytes long (UTF-8); it must be at least "
                f"{MIN_DRAW_SECRET_BYTES}: a short key makes every draw guessable. Use e.g. the "
                "64 hex characters of `openssl rand -hex 32`."
            )
            if not self.demo_mode:
                raise ShortDrawSecret(message)
            log.warning("%s Accepted only because EVENHAND_DEMO_MODE is set.", message)
        return key

    def signing_key_text(self) -> str | None:
        """The configured signing key's text (from the file or the setting), or None."""
        if self.signing_key_file:
            try:
                with open(self.signing_key_file, encoding="utf-8") as handle:
                    return handle.read()
            except OSError as exc:
                raise SigningKeyUnavailable(
                    f"EVENHAND_SIGNING_KEY_FILE {self.signing_key_file!r} cannot be read: "
                    f"{exc.strerror or exc}"
                ) from None
        if self.signing_key is not None and self.signing_key.get_secret_value().strip():
            return self.signing_key.get_secret_value()
        return None

    def demo_warning(self) -> str | None:
        """The line to print at start-up when demo mode is on (None otherwise)."""
        if not self.demo_mode:
            return None
        return (
            "EVENHAND_DEMO_MODE is on: settings meant for the invented demo are accepted "
            "(e.g. a short draw secret). Never use demo mode for decisions about real people."
        )


def get_settings() -> Settings:
    return Settings()
