"""The record encoding: the hot-path writer gives exactly the canonical JSON of the record
and the response JSON; record ids are UUIDs of version 7."""

from __future__ import annotations

import json
import time
import uuid
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from service.log.records import (
    RECORD_FIELDS,
    RESPONSE_FIELDS,
    decision_texts,
    encode_attributes,
    leaf_hash,
    new_record_ids,
)
from service.policy.document import canonical_json

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
    canonical, response = decision_texts(payload, encode_attributes(payload["attributes"]))
    assert canonical == canonical_json(payload)
    # The response: what json.dumps gives for the response fields (compact, UTF-8).
    expected = {k: payload[k] for k in RESPONSE_FIELDS}
    assert response == json.dumps(expected, separators=(",", ":"), ensure_ascii=False)


def test_leaf_hash_is_rfc_9162() -> None:
    # RFC 9162 section 2.1: a leaf is SHA-256(0x00 || entry). For the empty entry that is
    # the value below (from memory: the empty-leaf hash of the certificate-transparency
    # Merkle test vectors; `printf '\0' | sha256sum` gives the same).
    assert leaf_hash(b"") == "6e340b9cffb37a989ca544e6bb780a2c78901d3fb33738768511a30617afa01d"


def test_record_ids_are_time_ordered_uuid7() -> None:
    before = time.time_ns() // 1_000_000
    ids = new_record_ids(500)
    after = time.time_ns() // 1_000_000
    time.sleep(0.002)
    later = new_record_ids(1)[0]
    assert len(set(ids)) == 500
    for text_id in ids:
        parsed = uuid.UUID(text_id)  # the standard library's parser as the reference
        assert str(parsed) == text_id
        assert parsed.version == 7 and parsed.variant == uuid.RFC_4122
        # RFC 9562 section 5.7: the first 48 bits are Unix time in milliseconds.
        assert before <= parsed.int >> 80 <= after
    assert all(text_id < later for text_id in ids)  # a later millisecond sorts after
