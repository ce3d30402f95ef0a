"""The decision record: its canonical encoding in the log and the scoring response text.

:class:`DecisionRecord` is the one form a decision takes from the rule to the log to the
response: the scoring pipeline builds it, the store writes its row, the log hashes its
canonical bytes and the client gets its response text, each derived from the same record.

A decision's leaf in the log is SHA-256(0x00 || canonical bytes) (RFC 9162 section 2.1), the
canonical bytes being compact, key-sorted UTF-8 JSON (``canonical``) of every field that makes
up the decision plus ``"kind": "decision"`` (every kind of record names itself, so no record
of one kind encodes like one of another). Nothing of the encoding is stored: the sealer
computes it from the stored row, and so does verification. The row's integer id is left out
on purpose (the database assigns it; the log fixes each record's position).

Standard library only: the standalone bundle verifier imports this module.
"""

from __future__ import annotations

import json
import math
import os
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

DECISION = "decision"

_ENCODER = json.JSONEncoder(
    sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
)


def canonical(value: Any) -> bytes:
    """Compact, key-sorted JSON in UTF-8 (no NaN): the bytes every record kind hashes."""
    return _ENCODER.encode(value).encode("utf-8")


RECORD_FIELDS: tuple[str, ...] = (
    "recommendation_id",
    "request_id",
    "case_id",
    "policy",
    "version",
    "score",
    "attributes",
    "group",
    "rule",
    "probability",
    "draw",
    "action",
    "action_label",
    "issued_at",
    "shadow_version",
    "shadow_probability",
    "shadow_action",
)
"""The fields of a decision the log encodes, in the order of the table and the response."""


def format_timestamp(value: datetime) -> str:
    """The fixed ISO form used in records and responses: microseconds, UTC, ``Z``."""
    if value.tzinfo is None:
        raise ValueError("naive datetime in a record: timestamps must be aware (UTC)")
    return value.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


_last_stamp: tuple[datetime, str] = (
    datetime(1970, 1, 1, tzinfo=UTC),
    "1970-01-01T00:00:00.000000Z",
)


def _stamp(value: datetime) -> str:
    """:func:`format_timestamp`, remembering the last value: the records of a group or a batch
    share one ``issued_at``. (An aware datetime never equals a naive one, so a naive value
    still reaches the check.)"""
    global _last_stamp
    last = _last_stamp  # one read: another thread may replace the pair meanwhile
    if last[0] == value and value.tzinfo is not None:
        return last[1]
    text = format_timestamp(value)
    _last_stamp = (value, text)
    return text


_string = json.encoder.encode_basestring  # the encoder's own routine (ensure_ascii=False)


@dataclass(frozen=True, slots=True)
class DecisionRecord:
    """One decision as issued. The attributes are those the policy groups by (not to be
    changed once the record is built)."""

    recommendation_id: str
    request_id: str
    case_id: str
    policy: str
    version: int
    score: float
    attributes: dict[str, Any]
    group: str
    rule: str
    probability: float
    draw: float
    action: bool
    action_label: str
    issued_at: datetime
    shadow_version: int | None
    shadow_probability: float | None
    shadow_action: bool | None
    request_fingerprint: bytes = b""
    """A digest of the request that asked for it, stored beside it to tell a replay from a
    reuse of its request_id; not part of the log's encoding (empty when read from the log)."""

    @classmethod
    def from_stored(cls, rec: Any, request_fingerprint: bytes = b"") -> DecisionRecord:
        """The record from a :class:`~service.store.models.Recommendation`, a result row or a
        mapping of column values, normalised so every database gives the same."""
        # Decided once per record, not per field: verify reads every record in the log.
        get = _get_item if isinstance(rec, Mapping) else getattr
        return cls(
            str(get(rec, "recommendation_id")),
            str(get(rec, "request_id")),
            str(get(rec, "case_id")),
            str(get(rec, "policy")),
            int(get(rec, "version")),
            float(get(rec, "score")),
            dict(get(rec, "attributes")),
            str(get(rec, "group")),
            str(get(rec, "rule")),
            float(get(rec, "probability")),
            float(get(rec, "draw")),
            bool(get(rec, "action")),
            str(get(rec, "action_label")),
            _aware(get(rec, "issued_at")),
            _opt_int(get(rec, "shadow_version")),
            _opt_float(get(rec, "shadow_probability")),
            _opt_bool(get(rec, "shadow_action")),
            request_fingerprint,
        )

    def log_payload(self) -> dict[str, Any]:
        """The record as plain JSON data, with its kind: what :meth:`canonical_bytes` encodes."""
        return {
            "kind": DECISION,
            "recommendation_id": self.recommendation_id,
            "request_id": self.request_id,
            "case_id": self.case_id,
            "policy": self.policy,
            "version": self.version,
            "score": self.score,
            "attributes": self.attributes,
            "group": self.group,
            "rule": self.rule,
            "probability": self.probability,
            "draw": self.draw,
            "action": self.action,
            "action_label": self.action_label,
            "issued_at": _stamp(self.issued_at),
            "shadow_version": self.shadow_version,
            "shadow_probability": self.shadow_probability,
            "shadow_action": self.shadow_action,
        }

    def canonical_bytes(self) -> bytes:
        """The canonical bytes of the record: its leaf in the log hashes them."""
        return canonical(self.log_payload())

    def response_text(self) -> str:
        """The API response (``RecommendationResponse``, JSON text): ``json.dumps`` of the
        response fields in :data:`RESPONSE_FIELDS` order, compact and UTF-8, each field
        encoded once by its known type (the scoring hot path; tests/test_records.py checks it
        against the schema and the standard library's encoder). A replay re-encodes the
        stored record with it, so it gets the same bytes as the first answer."""
        probability, draw = self.probability, self.draw
        if not (math.isfinite(probability) and math.isfinite(draw)):
            raise ValueError("NaN or infinity in a record")
        text = _string
        return _RESPONSE_TEMPLATE % (  # in RESPONSE_FIELDS order
            text(self.recommendation_id),
            text(self.request_id),
            text(self.case_id),
            text(self.policy),
            int.__repr__(self.version),
            text(self.group),
            text(self.rule),
            float.__repr__(probability),
            float.__repr__(draw),
            "true" if self.action else "false",
            text(self.action_label),
            text(_stamp(self.issued_at)),
        )


def _get_item(rec: Any, name: str) -> Any:
    return rec[name]


def _aware(value: Any) -> datetime:
    if not isinstance(value, datetime) or value.tzinfo is None:
        raise ValueError("naive datetime in a record: timestamps must be aware (UTC)")
    return value


def _opt_float(value: Any) -> float | None:
    return None if value is None else float(value)


def _opt_int(value: Any) -> int | None:
    return None if value is None else int(value)


def _opt_bool(value: Any) -> bool | None:
    return None if value is None else bool(value)


def record_payload(rec: Any) -> dict[str, Any]:
    """A stored record's fields as plain JSON data (see :meth:`DecisionRecord.from_stored`)."""
    return DecisionRecord.from_stored(rec).log_payload()


def record_bytes(rec: Any) -> bytes:
    """The canonical bytes of a stored decision record."""
    return canonical(record_payload(rec))


def encode_attributes(attributes: dict[str, Any]) -> str:
    """Canonical JSON text of a record's attributes (also what the JSON column stores)."""
    return _ENCODER.encode(attributes)


# The response is the record without the score, the attributes and the shadow result, in
# the record's field order (the order the API has always sent).
RESPONSE_FIELDS: tuple[str, ...] = tuple(
    f
    for f in RECORD_FIELDS
    if f not in ("score", "attributes", "shadow_version", "shadow_probability", "shadow_action")
)
_RESPONSE_TEMPLATE = "{" + ",".join(f'"{k}":%s' for k in RESPONSE_FIELDS) + "}"

if RESPONSE_FIELDS != (
    "recommendation_id",
    "request_id",
    "case_id",
    "policy",
    "version",
    "group",
    "rule",
    "probability",
    "draw",
    "action",
    "action_label",
    "issued_at",
):
    raise AssertionError("DecisionRecord.response_text writes the fields in this order")


def batch_response_text(responses: Sequence[str], created: int) -> str:
    """The batch response (``BatchResponse``, JSON text) from its items' response texts."""
    return f'{{"items":[{",".join(responses)}],"created":{int(created)}}}'


def new_record_ids(count: int) -> list[str]:
    """``count`` fresh UUIDs of version 7 (RFC 9562 section 5.7): 48 bits of Unix time in
    milliseconds, then random bits. Time-ordered ids land at the end of the unique index
    instead of on a random page of it, which keeps the log's inserts cheap as it grows."""
    millis = time.time_ns() // 1_000_000
    random_bytes = os.urandom(10 * count)
    ids = []
    for i in range(count):
        rand = int.from_bytes(random_bytes[10 * i : 10 * i + 10], "big")
        value = (
            (millis << 80)
            | (0x7 << 76)  # version 7
            | (((rand >> 62) & 0xFFF) << 64)  # rand_a, 12 bits
            | (0b10 << 62)  # the RFC variant
            | (rand & ((1 << 62) - 1))  # rand_b, 62 bits
        )
        h = f"{value:032x}"
        ids.append(f"{h[:8]}-{h[8:12]}-{h[12:16]}-{h[16:20]}-{h[20:]}")
    return ids
