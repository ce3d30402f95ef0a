"""Canonical encodings of the records that follow a decision: outcome reports (first reports
and corrections), final decisions, audit snapshots, tally batches and retention purges.

Each is ``service.log.records.canonical`` of a flat dict with a ``kind`` field naming the
record kind. A record refers to its decision by the decision's ``recommendation_id`` (a UUID
the log itself holds), never by a database row id. Times are UTC with microseconds and ``Z``.
Changing an encoding after a release breaks verification of the records sealed under it.

Pure, standard library only (the standalone bundle verifier imports it); rows are anything
with the fields as attributes or a mapping of them.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from service.log.records import canonical, format_timestamp

OUTCOME = "outcome"
FINAL = "final"
SNAPSHOT = "snapshot"
TALLY_BATCH = "tally_batch"
PURGE = "purge"


def _getter(row: Any) -> Any:
    if isinstance(row, Mapping):
        return row.__getitem__
    return lambda name: getattr(row, name)


def _opt_str(value: Any) -> str | None:
    return None if value is None else str(value)


def _int01(value: Any) -> int:
    number = int(value)
    if number not in (0, 1):
        raise ValueError(f"an outcome is 0 or 1, got {value!r}")
    return number


def outcome_payload(row: Any) -> dict[str, Any]:
    """An outcome record with its decision's ``recommendation_id``."""
    get = _getter(row)
    return {
        "kind": OUTCOME,
        "recommendation_id": str(get("recommendation_id")),
        "outcome": _int01(get("outcome")),
        "observed_at": format_timestamp(get("observed_at")),
        "source": str(get("source")),
        "correction_reason": _opt_str(get("correction_reason")),
        "recorded_at": format_timestamp(get("recorded_at")),
        "recorded_by": str(get("recorded_by")),
    }


def final_payload(row: Any) -> dict[str, Any]:
    """A final decision with its decision's ``recommendation_id``."""
    get = _getter(row)
    return {
        "kind": FINAL,
        "recommendation_id": str(get("recommendation_id")),
        "overridden": bool(get("overridden")),
        "final_action": bool(get("final_action")),
        "reason_code": _opt_str(get("reason_code")),
        "decided_at": format_timestamp(get("decided_at")),
        "decided_by": _opt_str(get("decided_by")),
        "recorded_at": format_timestamp(get("recorded_at")),
        "recorded_by": str(get("recorded_by")),
    }


def snapshot_payload(row: Any) -> dict[str, Any]:
    """An audit snapshot by what identifies it, the figures its row repeats for listings, and
    the digests of its two views (the views themselves are bound through their digests, which
    verification recomputes)."""
    get = _getter(row)
    return {
        "kind": SNAPSHOT,
        "policy": str(get("policy")),
        "month": str(get("month")),
        "created_at": format_timestamp(get("created_at")),
        "created_by": str(get("created_by")),
        "time_zone": str(get("time_zone")),
        "code_version": str(get("code_version")),
        "versions": [int(v) for v in get("versions")],
        "recommendations": int(get("recommendations")),
        "outcomes": int(get("outcomes")),
        "digest": str(get("digest")),
        "internal_digest": _opt_str(get("internal_digest")),
    }


def tally_batch_payload(row: Any) -> dict[str, Any]:
    """A tally batch: the id ranges it counts, its time zone, and the digest of its rows."""
    get = _getter(row)
    ranges = get("ranges")
    if not isinstance(ranges, Mapping):
        raise ValueError("a tally batch's ranges must be an object")
    digest = get("digest")
    return {
        "kind": TALLY_BATCH,
        "created_at": format_timestamp(get("created_at")),
        "time_zone": str(get("time_zone")),
        "ranges": {str(k): [int(x) for x in v] for k, v in ranges.items()},
        "digest": bytes(digest).hex(),
    }


def purge_payload(row: Any) -> dict[str, Any]:
    """A retention purge: the last seal whose personal-data records it deleted, the last month
    it reached, the rows it deleted per kind, when and by whom."""
    get = _getter(row)
    counts = get("counts")
    if not isinstance(counts, Mapping):
        raise ValueError("a purge's counts must be an object")
    return {
        "kind": PURGE,
        "through_seal": int(get("through_seal")),
        "through_month": str(get("through_month")),
        "counts": {str(k): int(v) for k, v in counts.items()},
        "purged_at": format_timestamp(get("purged_at")),
        "by": str(get("by")),
    }


def outcome_bytes(row: Any) -> bytes:
    return canonical(outcome_payload(row))


def final_bytes(row: Any) -> bytes:
    return canonical(final_payload(row))


def snapshot_bytes(row: Any) -> bytes:
    return canonical(snapshot_payload(row))


def tally_batch_bytes(row: Any) -> bytes:
    return canonical(tally_batch_payload(row))


def purge_bytes(row: Any) -> bytes:
    return canonical(purge_payload(row))
