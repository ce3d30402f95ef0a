"""The log's signing key as the settings give it, and the public keys a verification trusts."""

from __future__ import annotations

import logging
from dataclasses import dataclass

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from service.log.heads import (
    key_id,
    load_signing_key,
    public_bytes,
    public_key_from_bytes,
)
from service.log.key_errors import SigningKeyError
from service.settings import Settings

log = logging.getLogger("evenhand.signing")


@dataclass(frozen=True)
class Signer:
    key: Ed25519PrivateKey
    key_id: str
    public_key: bytes

    @classmethod
    def of(cls, key: Ed25519PrivateKey) -> Signer:
        public = key.public_key()
        return cls(key, key_id(public), public_bytes(public))


_DEMO_KEYS: dict[str, Signer] = {}


def signer_from_settings(settings: Settings) -> Signer:
    """The configured signing key; refuses a missing, unreadable or weak one, except in
    demo mode, where a key made for this process stands in (with a warning)."""
    text = settings.signing_key_text()
    if text is None:
        if not settings.demo_mode:
            raise SigningKeyError(
                "no signing key: set EVENHAND_SIGNING_KEY_FILE to a file holding an Ed25519 "
                "key (`evenhand log keygen --out FILE` writes one) or EVENHAND_SIGNING_KEY; "
                "keep it outside the database"
            )
        signer = _DEMO_KEYS.get(settings.database_url)
        if signer is None:
            signer = _DEMO_KEYS[settings.database_url] = Signer.of(Ed25519PrivateKey.generate())
            log.warning(
                "EVENHAND_DEMO_MODE: signing tree heads with a key made for this process "
                "(%s); never for real decisions",
                signer.key_id,
            )
        return signer
    return Signer.of(load_signing_key(text))


def trusted_public_keys(settings: Settings) -> dict[str, bytes]:
    """Key id -> raw public key of every key the settings vouch for: the signing key's own
    (when one is configured) and the earlier keys listed in EVENHAND_TRUSTED_PUBLIC_KEYS."""
    trusted: dict[str, bytes] = {}
    for item in settings.trusted_public_keys.split(","):
        text = item.strip()
        if not text:
            continue
        try:
            raw = bytes.fromhex(text)
        except ValueError:
            raise SigningKeyError(
                f"EVENHAND_TRUSTED_PUBLIC_KEYS: {text[:20]!r} is not 64 hex digits"
            ) from None
        trusted[key_id(public_key_from_bytes(raw))] = raw
    if settings.signing_key_text() is not None or settings.demo_mode:
        signer = signer_from_settings(settings)
        trusted[signer.key_id] = signer.public_key
    return trusted
