"""The decision record: its canonical bytes are key-sorted compact JSON naming its kind, its
response text is exactly the documented response schema as ``json.dumps`` writes it, leaves
are RFC 9162 leaf hashes, and record ids are UUIDs of version 7."""

from __future__ import annotations

import json
import time
import uuid
from datetime import UTC, datetime
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.api.recommendation_schemas import BatchResponse, RecommendationResponse
from service.log.merkle import leaf_hash
from service.log.records import (
    RECORD_FIELDS,
    RESPONSE_FIELDS,
    DecisionRecord,
    batch_response_text,
    new_record_ids,
    record_bytes,
    record_payload,
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


def _compact(value: Any, sort_keys: bool = False) -> str:
    # The reference: the standard library's json module, compact, UTF-8.
    return json.dumps(value, sort_keys=sort_keys, separators=(",", ":"), ensure_ascii=False)


@settings(max_examples=300, deadline=None)
@given(rows)
def test_encodings_are_json_as_the_standard_library_writes_it(row: dict[str, Any]) -> None:
    assert set(row) == set(RECORD_FIELDS)
    record = DecisionRecord(**row, request_fingerprint=b"f" * 16)
    assert DecisionRecord.from_stored(row, b"f" * 16) == record
    assert record_payload(row) == record.log_payload()
    # The log: every field and the kind, keys sorted.
    expected = dict(row, kind="decision", issued_at=row["issued_at"].strftime(ISO))
    assert record.canonical_bytes() == _compact(expected, sort_keys=True).encode("utf-8")
    assert record_bytes(row) == record.canonical_bytes()
    assert json.loads(record.canonical_bytes()) == expected
    # The response: the documented schema (RecommendationResponse), its fields in order.
    answer = record.response_text()
    model = RecommendationResponse.model_validate_json(answer)
    assert answer == _compact(model.model_dump())
    assert list(model.model_dump()) == list(RESPONSE_FIELDS)
    assert model.model_dump() == {k: expected[k] for k in RESPONSE_FIELDS}


@settings(max_examples=50, deadline=None)
@given(st.lists(rows, max_size=4), st.integers(min_value=0, max_value=10_000))
def test_the_batch_response_is_the_documented_schema(
    items: list[dict[str, Any]], created: int
) -> None:
    answer = batch_response_text([DecisionRecord(**r).response_text() for r in items], created)
    model = BatchResponse.model_validate_json(answer)
    assert answer == _compact(model.model_dump())
    assert len(model.items) == len(items) and model.created == created


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
