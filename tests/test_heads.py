"""Signed tree heads: Ed25519 against the RFC 8032 test vectors, key loading, tampering."""

from __future__ import annotations

import base64

import pytest
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from service.log.heads import (
    SigningKeyError,
    TreeHead,
    key_id,
    load_signing_key,
    new_signing_key,
    public_bytes,
    sign_head,
    verify_head,
)

# RFC 8032 (Josefsson & Liusvaara 2017, "Edwards-Curve Digital Signature Algorithm"),
# section 7.1, TEST 1 to TEST 3: secret key (seed), public key, message, signature.
RFC8032 = [
    (
        "9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60",
        "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a",
        "",
        "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b",
    ),
    (
        "4ccd089b28ff96da9db6c346ec114e0f5b8a319f35aba624da8cf6ed4fb8a6fb",
        "3d4017c3e843895a92b70aa74d1b7ebc9c982ccf2ec4968cc0cd55f12af4660c",
        "72",
        "92a009a9f0d4cab8720e820b5f642540a2b27b5416503f8fb3762223ebdb69da085ac1e43e15996e458f3613d0f11d8c387b2eaeb4302aeeb00d291612bb0c00",
    ),
    (
        "c5aa8df43f9f837bedb7442f31dcb7b166d38535076f094b85ce3a2e0b4458f7",
        "fc51cd8e6218a1a38da47ed00230f0580816ed13ba3303ac5deb911548908025",
        "af82",
        "6291d657deec24024827e69c3abe01a30ce548a284743a445e3680d7db5ac3ac18ff9b538d16f290ae67f760984dc6594a7c15e9716ed28dc027beceea1ec40a",
    ),
]


@pytest.mark.parametrize(("seed", "public", "message", "signature"), RFC8032)
def test_rfc8032_vectors(seed: str, public: str, message: str, signature: str) -> None:
    key = load_signing_key(seed)
    assert public_bytes(key.public_key()).hex() == public
    assert key.sign(bytes.fromhex(message)).hex() == signature


def head(key: Ed25519PrivateKey, **changes: object) -> TreeHead:
    fields: dict[str, object] = {
        "seal_id": 3,
        "tree_size": 12345,
        "root": bytes(range(32)),
        "created_at": "2026-12-04T12:00:00.000000Z",
        "key_id": key_id(key.public_key()),
    }
    fields.update(changes)
    return TreeHead(**fields)  # type: ignore[arg-type]


def test_a_signed_head_verifies_and_any_change_breaks_it() -> None:
    key, _ = new_signing_key()
    keys = {key_id(key.public_key()): public_bytes(key.public_key())}
    h = head(key)
    signature = sign_head(h, key)
    assert verify_head(h, signature, keys) is None
    for change in (
        {"tree_size": 12346},
        {"root": bytes(32)},
        {"seal_id": 4},
        {"created_at": "2026-12-04T12:00:00.000001Z"},
    ):
        assert verify_head(head(key, **change), signature, keys) is not None, change
    other, _ = new_signing_key()
    assert "unknown key" in (verify_head(head(other), signature, keys) or "")
    assert TreeHead.from_payload(h.payload()) == h


def test_rotated_keys_keep_old_heads_verifiable() -> None:
    old, _ = new_signing_key()
    new, _ = new_signing_key()
    keys = {key_id(k.public_key()): public_bytes(k.public_key()) for k in (old, new)}
    first, second = head(old, seal_id=1), head(new, seal_id=2)
    assert verify_head(first, sign_head(first, old), keys) is None
    assert verify_head(second, sign_head(second, new), keys) is None


def test_key_loading_accepts_hex_base64_and_pem_and_refuses_weak_keys() -> None:
    key, seed_hex = new_signing_key()
    seed = bytes.fromhex(seed_hex)
    pem = key.private_bytes(
        serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
    ).decode()
    for text in (seed_hex, base64.b64encode(seed).decode(), pem, f"  {seed_hex}\n"):
        assert key_id(load_signing_key(text).public_key()) == key_id(key.public_key())
    for weak in (
        "",
        "00" * 32,
        "ab" * 32,
        "01" * 16,
        "not a key",
        base64.b64encode(b"x" * 31).decode(),
    ):
        with pytest.raises(SigningKeyError):
            load_signing_key(weak)
