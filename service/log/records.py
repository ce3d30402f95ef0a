"""The canonical encoding of a decision record, and the scoring path's response text.

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
from collections.abc import Mapping
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
"""The stored fields of a decision, in the order of the table and the response."""


def format_timestamp(value: datetime) -> str:
    """The fixed ISO form used in records and responses: microseconds, UTC, ``Z``."""
    if value.tzinfo is None:
        raise ValueError("naive datetime in a record: timestamps must be aware (UTC)")
    return value.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _get_item(rec: Any, name: str) -> Any:
    return rec[name]


def _opt_float(value: Any) -> float | None:
    return None if value is None else float(value)


def _opt_int(value: Any) -> int | None:
    return None if value is None else int(value)


def _opt_bool(value: Any) -> bool | None:
    return None if value is None else bool(value)


def record_payload(rec: Any) -> dict[str, Any]:
    """The record's fields as plain JSON data, normalised so every database gives the same.

    ``rec`` may be a :class:`~service.store.models.Recommendation`, a result row or a mapping
    of column values.
    """
    # Decided once per record, not per field: verify calls this for every record in the log.
    _get = _get_item if isinstance(rec, Mapping) else getattr
    return {
        "kind": DECISION,
        "recommendation_id": str(_get(rec, "recommendation_id")),
        "request_id": str(_get(rec, "request_id")),
        "case_id": str(_get(rec, "case_id")),
        "policy": str(_get(rec, "policy")),
        "version": int(_get(rec, "version")),
        "score": float(_get(rec, "score")),
        "attributes": dict(_get(rec, "attributes")),
        "group": str(_get(rec, "group")),
        "rule": str(_get(rec, "rule")),
        "probability": float(_get(rec, "probability")),
        "draw": float(_get(rec, "draw")),
        "action": bool(_get(rec, "action")),
        "action_label": str(_get(rec, "action_label")),
        "issued_at": format_timestamp(_get(rec, "issued_at")),
        "shadow_version": _opt_int(_get(rec, "shadow_version")),
        "shadow_probability": _opt_float(_get(rec, "shadow_probability")),
        "shadow_action": _opt_bool(_get(rec, "shadow_action")),
    }


def record_bytes(rec: Any) -> bytes:
    """The canonical bytes of a decision record."""
    return canonical(record_payload(rec))


def encode_attributes(attributes: dict[str, Any]) -> str:
    """Canonical JSON text of a record's attributes (also what the JSON column stores)."""
    return _ENCODER.encode(attributes)


# The response is the record without the score, the attributes and the shadow result, in
# the record's field order (the order the API has always sent; a replay re-encodes a stored
# record with json.dumps in this order and must give the same bytes).
RESPONSE_FIELDS: tuple[str, ...] = tuple(
    f
    for f in RECORD_FIELDS
    if f not in ("score", "attributes", "shadow_version", "shadow_probability", "shadow_action")
)
_RESPONSE_TEMPLATE = "{" + ",".join(f'"{k}":%s' for k in RESPONSE_FIELDS) + "}"
_string = json.encoder.encode_basestring  # the encoder's own routine (ensure_ascii=False)


def response_text(payload: dict[str, Any]) -> str:
    """The API response (JSON text) of a new decision given in :func:`record_payload` form
    (``issued_at`` already formatted): ``json.dumps`` of the response fields, compact and
    UTF-8, each field encoded once by its known type (the scoring hot path)."""
    probability, draw = payload["probability"], payload["draw"]
    if not (math.isfinite(probability) and math.isfinite(draw)):
        raise ValueError("NaN or infinity in a record")
    text = _string
    return _RESPONSE_TEMPLATE % (  # in RESPONSE_FIELDS order
        text(payload["recommendation_id"]),
        text(payload["request_id"]),
        text(payload["case_id"]),
        text(payload["policy"]),
        int.__repr__(payload["version"]),
        text(payload["group"]),
        text(payload["rule"]),
        float.__repr__(probability),
        float.__repr__(draw),
        "true" if payload["action"] else "false",
        text(payload["action_label"]),
        text(payload["issued_at"]),
    )


assert RESPONSE_FIELDS == (
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
), "response_text writes the fields in this order"


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
