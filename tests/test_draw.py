"""The keyed draw, checked against a direct computation with the standard library."""

import hashlib
import hmac
import json

from service.policy.rules import MAX_DRAW, keyed_draw, keyed_draws


def _reference(secret: bytes, name: str, version: int, case_id: str) -> float:
    # The draw as docs/decision-log.md defines it: first 8 bytes of HMAC-SHA256 (RFC 2104,
    # FIPS 180-4) over the compact JSON array [name, version, case_id], big-endian unsigned,
    # divided by 2^64; computed here with the standard library's hmac only.
    message = json.dumps([name, version, case_id], separators=(",", ":"), ensure_ascii=False)
    digest = hmac.new(secret, message.encode("utf-8"), hashlib.sha256).digest()
    return int.from_bytes(digest[:8], "big") / 2**64


def test_draw_matches_definition() -> None:
    for case_id in ["c-1", "ünï", 'quote"and,comma]', ""]:
        assert keyed_draw(b"secret", "pol", 3, case_id) == _reference(b"secret", "pol", 3, case_id)


def test_batch_draws_equal_scalar_draws() -> None:
    ids = [f"case-{i}" for i in range(200)] + ["ünï", 'a"b']
    batch = keyed_draws(b"k", "fernhollow", 7, ids)
    assert [float(x) for x in batch] == [keyed_draw(b"k", "fernhollow", 7, c) for c in ids]


def test_draw_depends_on_every_part_of_the_message() -> None:
    base = keyed_draw(b"k", "p", 1, "c")
    assert keyed_draw(b"k2", "p", 1, "c") != base
    assert keyed_draw(b"k", "q", 1, "c") != base
    assert keyed_draw(b"k", "p", 2, "c") != base
    assert keyed_draw(b"k", "p", 1, "d") != base
    assert 0.0 <= base <= MAX_DRAW < 1.0
