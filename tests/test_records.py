"""The record encoding: a decision's canonical bytes are key-sorted compact JSON naming its
kind, the hot-path response is exactly ``json.dumps`` of the response fields, leaves are
RFC 9162 leaf hashes, and record ids are UUIDs of version 7."""

from __future__ import annotations

import json
import time
import uuid
from datetime import UTC, datetime
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.log.merkle import leaf_hash
from service.log.records import (
    RECORD_FIELDS,
    RESPONSE_FIELDS,
    new_record_ids,
    record_bytes,
    record_payload,
    response_text,
)

text = st.text(max_size=20)  # any unicode: quotes, backslashes, control characters
finite = st.floats(allow_nan=False, allow_infinity=False)
ISO = "%Y-%m-%dT%H:%M:%S.%fZ"  # RFC 3339 with microseconds, UTC
scalar = st.one_of(text, st.integers(), finite, st.booleans())
rows = st.fixed_dictionaries(
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
        "issued_at": st.datetimes(
            min_value=datetime(2000, 1, 1), max_value=datetime(2100, 1, 1), timezones=st.just(UTC)
        ),
        "shadow_version": st.none() | st.integers(min_value=1, max_value=99),
        "shadow_probability": st.none() | finite,
        "shadow_action": st.none() | st.booleans(),
    }
)


@settings(max_examples=300, deadline=None)
@given(rows)
def test_encodings_are_json_as_the_standard_library_writes_it(row: dict[str, Any]) -> None:
    assert set(row) == set(RECORD_FIELDS)
    payload = record_payload(row)
    # The reference: the standard library's json module, keys sorted, compact, UTF-8.
    expected = dict(row, kind="decision", issued_at=row["issued_at"].strftime(ISO))
    assert record_bytes(row) == json.dumps(
        expected, sort_keys=True, separators=(",", ":"), ensure_ascii=False
    ).encode("utf-8")
    assert json.loads(record_bytes(row)) == expected
    # The response: json.dumps of the response fields in their order (compact, UTF-8).
    response = {k: expected[k] for k in RESPONSE_FIELDS}
    assert response_text(payload) == json.dumps(response, separators=(",", ":"), ensure_ascii=False)


def test_a_naive_timestamp_is_refused() -> None:
    row = {name: None for name in RECORD_FIELDS}
    row.update(
        recommendation_id="r",
        request_id="q",
        case_id="c",
        policy="p",
        version=1,
        score=0.5,
        attributes={},
        group="g",
        rule="g",
        probability=1.0,
        draw=0.5,
        action=True,
        action_label="a",
        issued_at=datetime(2026, 1, 1),
    )
    with pytest.raises(ValueError, match="naive"):
        record_payload(row)


def test_leaf_hash_is_rfc_9162() -> None:
    # RFC 9162 section 2.1: a leaf is SHA-256(0x00 || entry). For the empty entry that is
    # the value below (from memory: the empty-leaf hash of the certificate-transparency
    # Merkle test vectors; `printf '\0' | sha256sum` gives the same).
    assert (
        leaf_hash(b"").hex() == "6e340b9cffb37a989ca544e6bb780a2c78901d3fb33738768511a30617afa01d"
    )


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
