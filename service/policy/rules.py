"""Applying a policy: rule lookup, the keyed draw, scalar and vectorised evaluation.

The draw for a case is u = first 8 bytes (big-endian) of HMAC-SHA256(secret, message) / 2^64,
message = UTF-8 of the compact JSON array ``[name, version, case_id]``; the action is taken
iff u < P(action | score). The same case under the same version always gets the same draw,
so a higher score never loses the action and an auditor holding the secret can replay
every decision. u is capped at the largest double below 1, because the float quotient of a
value within 2^-54 of 2^64 would round up to exactly 1.0 and a probability-1 rule would then
refuse the action.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import numpy.typing as npt

from service.policy.document import DEFAULT_RULE_KEY, PolicyDocument, Rule, resolve_rule_key
from service.policy.errors import ScoreOutOfRange, UnknownGroup

_TWO_64 = float(2**64)
MAX_DRAW = math.nextafter(1.0, 0.0)


@lru_cache(maxsize=64)
def _keyed_prefix(secret: bytes, name: str, version: int) -> hmac.HMAC:
    """The HMAC state after the message's fixed prefix ``[name,version,``: the same for every
    case of a version, so it is hashed once and copied per case."""
    prefix = json.dumps([name, version], separators=(",", ":"), ensure_ascii=False)[:-1] + ","
    return hmac.new(secret, prefix.encode("utf-8"), hashlib.sha256)


# encode_basestring is exactly what json.dumps(case_id, ensure_ascii=False) returns, without the
# encoder set-up per call: the string as it appears inside the array.
_encode_string = json.encoder.encode_basestring


def keyed_draw(secret: bytes, name: str, version: int, case_id: str) -> float:
    mac = _keyed_prefix(secret, name, version).copy()
    mac.update((_encode_string(case_id) + "]").encode("utf-8"))
    return min(int.from_bytes(mac.digest()[:8], "big") / _TWO_64, MAX_DRAW)


def keyed_draws(
    secret: bytes, name: str, version: int, case_ids: Sequence[str]
) -> npt.NDArray[np.float64]:
    """Draws for many cases: one HMAC each, on a reused keyed state, then one numpy pass."""
    encode = _encode_string
    copy = _keyed_prefix(secret, name, version).copy
    heads: list[bytes] = []
    append = heads.append
    for case_id in case_ids:
        mac = copy()
        mac.update((encode(case_id) + "]").encode("utf-8"))
        append(mac.digest()[:8])
    raw = np.frombuffer(b"".join(heads), dtype=">u8").astype(np.float64)
    return np.minimum(raw / _TWO_64, MAX_DRAW)


@dataclass(frozen=True, slots=True)
class Decision:
    action: bool
    action_label: str
    probability: float
    draw: float
    group: str
    rule: str


def rule_for(policy: PolicyDocument, group: str) -> tuple[str, Rule]:
    """The rule used for ``group`` and the key it was found under; refuses rather than guess."""
    key = resolve_rule_key(policy, group)
    if key is None:
        known = "known" if group in policy.groups.known else "unknown"
        raise UnknownGroup(
            f"group {group!r} ({known}) has no rule in policy {policy.name!r} and no fallback "
            "applies",
            field="attributes",
        )
    if key == DEFAULT_RULE_KEY:
        default = policy.groups.fallback.default
        assert default is not None  # resolve_rule_key only names it when set
        return key, default
    return key, policy.rules[key]


def check_score(policy: PolicyDocument, score: float) -> None:
    low, high = policy.score_range
    if not (math.isfinite(score) and low <= score <= high):
        raise ScoreOutOfRange(
            f"score {score!r} is outside the policy's range [{low:g}, {high:g}]", field="score"
        )


def evaluate(
    policy: PolicyDocument,
    version: int,
    score: float,
    attributes: dict[str, object],
    case_id: str,
    secret: bytes,
) -> Decision:
    """One recommendation for one case."""
    check_score(policy, score)
    group = policy.group_key(attributes)
    rule_key, rule = rule_for(policy, group)
    probability = rule.probability_at(score)
    draw = keyed_draw(secret, policy.name, version, case_id)
    action = draw < probability
    label = policy.action_label if action else policy.no_action_label
    return Decision(action, label, probability, draw, group, rule_key)


def rule_probabilities(rule: Rule, scores: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    """P(action | s) for many scores; the same table lookup as :meth:`Rule.probability_at`."""
    starts = np.array([s.start for s in rule.steps], dtype=np.float64)
    table = np.array([0.0] + [s.probability for s in rule.steps], dtype=np.float64)
    return table[np.searchsorted(starts, scores, side="right")]


@dataclass(frozen=True, slots=True)
class BatchDecisions:
    action: npt.NDArray[np.bool_]
    probability: npt.NDArray[np.float64]
    draw: npt.NDArray[np.float64]
    group: list[str]
    rule: list[str]


def decide(
    probabilities: npt.NDArray[np.float64], draws: npt.NDArray[np.float64]
) -> npt.NDArray[np.bool_]:
    """Given probabilities and draws, the actions: the vectorised hot path."""
    return draws < probabilities


def evaluate_batch(
    policy: PolicyDocument,
    version: int,
    scores: Sequence[float] | npt.NDArray[np.float64],
    groups: Sequence[str],
    case_ids: Sequence[str],
    secret: bytes,
) -> BatchDecisions:
    """Many cases at once, bit-identical to calling :func:`evaluate` on each.

    ``groups`` are group keys (see :meth:`PolicyDocument.group_key`).
    """
    score_arr = np.asarray(scores, dtype=np.float64)
    if not (len(score_arr) == len(groups) == len(case_ids)):
        raise ValueError("scores, groups and case_ids must have the same length")
    low, high = policy.score_range
    bad = ~(np.isfinite(score_arr) & (score_arr >= low) & (score_arr <= high))
    if bad.any():
        i = int(np.argmax(bad))
        check_score(policy, float(score_arr[i]))
    probabilities = np.empty_like(score_arr)
    rule_keys: list[str] = [""] * len(groups)
    by_group: dict[str, list[int]] = {}
    for i, g in enumerate(groups):
        by_group.setdefault(g, []).append(i)
    for g, rows in by_group.items():
        key, rule = rule_for(policy, g)
        idx = np.asarray(rows, dtype=np.intp)
        probabilities[idx] = rule_probabilities(rule, score_arr[idx])
        for i in rows:
            rule_keys[i] = key
    draws = keyed_draws(secret, policy.name, version, case_ids)
    return BatchDecisions(
        decide(probabilities, draws), probabilities, draws, list(groups), rule_keys
    )
