"""Service settings, read from ``EVENHAND_*`` environment variables (pydantic-settings)."""

from __future__ import annotations

from typing import Literal

from pydantic import Field, SecretStr
from pydantic_settings import BaseSettings, SettingsConfigDict


class MissingDrawSecret(RuntimeError):
    """Raised when scoring is attempted without ``EVENHAND_DRAW_SECRET``."""


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="EVENHAND_", extra="ignore")

    database_url: str = Field(
        default="sqlite:///./evenhand.db",
        description="SQLAlchemy URL: a SQLite file (WAL mode) or postgresql+psycopg://...",
    )
    draw_secret: SecretStr | None = Field(
        default=None, description="HMAC key of the keyed draw; required to serve or score"
    )
    host: str = "127.0.0.1"
    port: int = Field(default=8000, ge=1, le=65535)
    workers: int = Field(default=1, ge=1)
    seal_interval_seconds: float = Field(default=5.0, gt=0)
    timezone: str = Field(default="UTC", description="IANA zone that audit months are cut in")
    max_batch_items: int = Field(default=10_000, ge=1)
    max_body_bytes: int = Field(default=8 * 1024 * 1024, ge=1024)
    sqlite_synchronous: Literal["OFF", "NORMAL", "FULL", "EXTRA"] = Field(
        default="FULL", description="SQLite PRAGMA synchronous; FULL makes every commit durable"
    )
    sqlite_busy_timeout_ms: int = Field(default=30_000, ge=0)

    def draw_key(self) -> bytes:
        """The draw secret as bytes; refuses clearly when it is not set."""
        if self.draw_secret is None or not self.draw_secret.get_secret_value():
            raise MissingDrawSecret(
                "EVENHAND_DRAW_SECRET is not set: the keyed draw needs a secret. Set it to a "
                "long random value (e.g. `openssl rand -hex 32`) and keep it: changing it "
                "changes every future draw."
            )
        return self.draw_secret.get_secret_value().encode("utf-8")


def get_settings() -> Settings:
    return Settings()
