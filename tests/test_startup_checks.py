"""Secrets and settings fail fast: a short draw secret stops the server before it decides.

The draw secret is measured in bytes of its UTF-8 encoding and must hold at least 32 (256
bits, the output size of HMAC-SHA256; RFC 2104, section 3, strongly discourages keys shorter
than the hash output: from memory). Only the demo's own server (EVENHAND_DEMO_MODE) accepts
less, with a warning.
"""

from __future__ import annotations

import logging
from pathlib import Path

import pytest
from pydantic import ValidationError

from service.app import create_app
from service.cli.main import main
from service.settings import MIN_DRAW_SECRET_BYTES, Settings, ShortDrawSecret
from tests.helpers import TEST_SECRET


def _settings(tmp_path: Path, secret: str, **extra: object) -> Settings:
    return Settings(database_url=f"sqlite:///{tmp_path}/s.db", draw_secret=secret, **extra)  # type: ignore[arg-type]


def test_the_test_secret_is_long_enough() -> None:
    assert len(TEST_SECRET.encode("utf-8")) >= MIN_DRAW_SECRET_BYTES == 32


@pytest.mark.parametrize(
    ("secret", "accepted"),
    [
        ("x" * 3, False),
        ("x" * 31, False),
        ("x" * 32, True),
        ("\u00e9" * 15 + "x", False),  # 16 characters, 31 bytes
        ("\u00e9" * 16, True),  # 16 characters, 32 bytes: bytes count, not characters
        ("0123456789abcdef" * 4, True),  # `openssl rand -hex 32`: 64 hex characters
    ],
)
def test_draw_secret_length(tmp_path: Path, secret: str, accepted: bool) -> None:
    settings = _settings(tmp_path, secret)
    if accepted:
        assert settings.draw_key() == secret.encode("utf-8")
        create_app(settings)
        return
    with pytest.raises(ShortDrawSecret, match=r"EVENHAND_DRAW_SECRET is .* at least 32"):
        create_app(settings)


def test_demo_mode_accepts_a_short_secret_with_a_warning(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    settings = _settings(tmp_path, "abc", demo_mode=True)
    with caplog.at_level(logging.WARNING):
        create_app(settings)
    text = caplog.text
    assert "EVENHAND_DEMO_MODE is on" in text and "Never use demo mode" in text
    assert "3 bytes long" in text


def test_serve_refuses_a_short_secret(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("EVENHAND_DATABASE_URL", f"sqlite:///{tmp_path}/s.db")
    monkeypatch.setenv("EVENHAND_DRAW_SECRET", "too-short")
    monkeypatch.delenv("EVENHAND_DEMO_MODE", raising=False)
    assert main(["serve"]) == 2
    err = capsys.readouterr().err
    assert "is 9 bytes long (UTF-8); it must be at least 32" in err
    assert "openssl rand -hex 32" in err


def test_settings_bounds() -> None:
    with pytest.raises(ValidationError):
        Settings(clock_skew_seconds=-1)
    with pytest.raises(ValidationError):
        Settings(max_batch_items=100_001)
    assert Settings().clock_skew_seconds == 300
