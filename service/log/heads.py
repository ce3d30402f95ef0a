"""Signed tree heads: what a seal states about the whole log, signed with Ed25519.

A tree head says: after seal ``seal_id`` the log holds ``tree_size`` leaves whose Merkle tree
head (RFC 9162 section 2.1) is ``root``. Its signed bytes are the canonical JSON of those
fields with a format tag, and the signature is Ed25519 (RFC 8032) by the key named
``key_id`` (the first 16 bytes of the SHA-256 of the raw public key, in hex). The signing
key lives outside the database (a file or an environment setting); public keys are published
and kept, so heads signed with a key that has since been rotated still verify.

Standard library and ``cryptography`` only: the standalone bundle verifier imports this module.
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import json
from dataclasses import dataclass
from typing import Any

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from service.log.key_errors import SigningKeyError

HEAD_FORMAT = "evenhand.tree-head/1"
SEED_BYTES = 32


def canonical(value: Any) -> bytes:
    """Compact, key-sorted JSON in UTF-8: the bytes that are hashed and signed."""
    return json.dumps(
        value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    ).encode("utf-8")


@dataclass(frozen=True, slots=True)
class TreeHead:
    seal_id: int
    tree_size: int
    root: bytes
    created_at: str
    key_id: str

    def payload(self) -> dict[str, Any]:
        return {
            "format": HEAD_FORMAT,
            "seal_id": self.seal_id,
            "tree_size": self.tree_size,
            "root": self.root.hex(),
            "created_at": self.created_at,
            "key_id": self.key_id,
        }

    def signed_bytes(self) -> bytes:
        return canonical(self.payload())

    @classmethod
    def from_payload(cls, payload: dict[str, Any]) -> TreeHead:
        if payload.get("format") != HEAD_FORMAT:
            raise ValueError(f"not a tree head of format {HEAD_FORMAT}")
        return cls(
            seal_id=int(payload["seal_id"]),
            tree_size=int(payload["tree_size"]),
            root=bytes.fromhex(payload["root"]),
            created_at=str(payload["created_at"]),
            key_id=str(payload["key_id"]),
        )


def public_bytes(key: Ed25519PublicKey) -> bytes:
    return key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)


def key_id(key: Ed25519PublicKey) -> str:
    """The first 16 bytes of SHA-256 of the raw 32-byte public key, in hex."""
    return hashlib.sha256(public_bytes(key)).digest()[:16].hex()


def public_key_from_bytes(raw: bytes) -> Ed25519PublicKey:
    if len(raw) != 32:
        raise SigningKeyError(f"an Ed25519 public key has 32 bytes, got {len(raw)}")
    return Ed25519PublicKey.from_public_bytes(raw)


def _weak(seed: bytes) -> str | None:
    if len(seed) != SEED_BYTES:
        return f"an Ed25519 key is a {SEED_BYTES}-byte seed, got {len(seed)} bytes"
    if len(set(seed)) < 8:
        return "the seed repeats a handful of byte values: not a random key"
    return None


def load_signing_key(text: str | bytes) -> Ed25519PrivateKey:
    """An Ed25519 private key from a PEM (PKCS#8) text or a 32-byte seed in hex or base64.

    Refuses a missing, malformed or weak key (a seed that is not 32 bytes, or that repeats a
    handful of byte values, like an all-zero key).
    """
    data = text.encode("ascii", "replace") if isinstance(text, str) else text
    data = data.strip()
    if not data:
        raise SigningKeyError("the signing key is empty")
    if data.startswith(b"-----BEGIN"):
        try:
            key = serialization.load_pem_private_key(data, password=None)
        except (ValueError, TypeError) as exc:
            raise SigningKeyError(
                f"the signing key is not a readable PEM private key: {exc}"
            ) from None
        if not isinstance(key, Ed25519PrivateKey):
            raise SigningKeyError("the signing key is not an Ed25519 key")
        seed = key.private_bytes(
            serialization.Encoding.Raw,
            serialization.PrivateFormat.Raw,
            serialization.NoEncryption(),
        )
    else:
        seed = _decode_seed(data)
    problem = _weak(seed)
    if problem is not None:
        raise SigningKeyError(problem)
    return Ed25519PrivateKey.from_private_bytes(seed)


def _decode_seed(data: bytes) -> bytes:
    text = data.decode("ascii", "replace")
    if len(text) == 2 * SEED_BYTES:
        try:
            return bytes.fromhex(text)
        except ValueError:
            pass
    try:
        return base64.b64decode(text, validate=True)
    except (binascii.Error, ValueError):
        raise SigningKeyError(
            "the signing key is neither PEM nor a 32-byte seed in hex (64 characters) or base64"
        ) from None


def new_signing_key() -> tuple[Ed25519PrivateKey, str]:
    """A fresh key and its seed in hex (what `evenhand log keygen` writes)."""
    key = Ed25519PrivateKey.generate()
    seed = key.private_bytes(
        serialization.Encoding.Raw, serialization.PrivateFormat.Raw, serialization.NoEncryption()
    )
    return key, seed.hex()


def sign_head(head: TreeHead, key: Ed25519PrivateKey) -> bytes:
    if head.key_id != key_id(key.public_key()):
        raise ValueError("the head names another key than the one signing it")
    return key.sign(head.signed_bytes())


def verify_head(head: TreeHead, signature: bytes, public_keys: dict[str, bytes]) -> str | None:
    """None when ``signature`` is a valid signature of ``head`` by the key it names among
    ``public_keys`` (key id -> raw public key), else what is wrong."""
    raw = public_keys.get(head.key_id)
    if raw is None:
        return f"head of seal {head.seal_id} is signed by unknown key {head.key_id}"
    key = public_key_from_bytes(raw)
    if key_id(key) != head.key_id:
        return f"published key {head.key_id} does not hash to its id"
    try:
        key.verify(signature, head.signed_bytes())
    except InvalidSignature:
        return f"head of seal {head.seal_id}: the signature does not verify"
    return None
