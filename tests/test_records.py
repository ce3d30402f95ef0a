"""The record encoding: the hot-path writer gives exactly the canonical JSON of the record."""

from __future__ import annotations

import hashlib
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from service.policy.document import canonical_json
from service.store.records import RECORD_FIELDS, payload_bytes, payload_leaf_hash

text = st.text(max_size=20)  # any unicode: quotes, backslashes, control characters
finite = st.floats(allow_nan=False, allow_infinity=False)
scalar = st.one_of(text, st.integers(), finite, st.booleans())
payloads = st.fixed_dictionaries(
    {
        "recommendation_id": text,
        "request_id": text,
        "case_id": text,
        "policy": text,
        "version": st.integers(min_value=1, max_value=2**40),
        "score": finite,
        "attributes": st.dictionaries(text, scalar, max_size=4),
        "group": text,
        "rule": text,
        "probability": finite,
        "draw": finite,
        "action": st.booleans(),
        "action_label": text,
        "issued_at": text,
        "shadow_version": st.none() | st.integers(min_value=1, max_value=99),
        "shadow_probability": st.none() | finite,
        "shadow_action": st.none() | st.booleans(),
    }
)


@settings(max_examples=300, deadline=None)
@given(payloads)
def test_hot_path_encoding_is_canonical_json(payload: dict[str, Any]) -> None:
    assert set(payload) == set(RECORD_FIELDS)
    assert payload_bytes(payload) == canonical_json(payload)
    # RFC 9162 section 2.1 leaf hash: SHA-256 over 0x00 followed by the entry.
    expected = hashlib.sha256(b"\x00" + canonical_json(payload)).hexdigest()
    assert payload_leaf_hash(payload) == expected
