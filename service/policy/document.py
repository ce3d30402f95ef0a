"""The policy document: what a policy version says, validated by pydantic.

A document is plain JSON. Once stored as a version it never changes; its content hash is
computed over :func:`canonical_json`.

Rules are non-decreasing step functions from score to the probability of the action. A
rule is a list of steps ``{"from": s, "probability": p}``: at scores ``>= s`` the action is
taken with probability ``p`` (until the next step); below the first step, never. A plain
cut ``t`` is ``[{"from": t, "probability": 1}]``; a band ``[lo, hi)`` with probability
``p`` is ``[{"from": lo, "probability": p}, {"from": hi, "probability": 1}]``.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from typing import Any, Literal, Self

from pydantic import (
    Field,
    field_validator,
    model_validator,
)

from service.policy.attributes import (
    GROUP_SEPARATOR,
    MAX_ATTRIBUTES,
    MAX_GROUP_KEY_CHARS,
    AttributeProblem,
    is_canonical,
    read_attribute,
)
from service.policy.targets import Targets
from service.policy.values import (
    Cost,
    GroupKey,
    Label,
    Probability,
    Prose,
    ScoreValue,
    Slug,
    StrictModel,
)

__all__ = ["GROUP_SEPARATOR"]


class Step(StrictModel):
    """From score ``start`` upward the action is taken with ``probability``."""

    start: ScoreValue = Field(alias="from")
    probability: Probability


class Rule(StrictModel):
    """A non-decreasing step function from score to P(action)."""

    steps: list[Step] = Field(min_length=1)

    @field_validator("steps")
    @classmethod
    def _monotone(cls, steps: list[Step]) -> list[Step]:
        for i in range(1, len(steps)):
            prev, cur = steps[i - 1], steps[i]
            if not cur.start > prev.start:
                raise ValueError(
                    f"steps[{i}].from ({cur.start}) must be greater than "
                    f"steps[{i - 1}].from ({prev.start}): breakpoints must be in increasing order"
                )
            if cur.probability < prev.probability:
                raise ValueError(
                    f"steps[{i}].probability ({cur.probability}) is below "
                    f"steps[{i - 1}].probability ({prev.probability}): a rule must never "
                    "lower the probability of the action as the score rises"
                )
        return steps

    @classmethod
    def cut(cls, threshold: float) -> Rule:
        return cls(steps=[Step(start=threshold, probability=1.0)])

    @classmethod
    def band(cls, low: float, high: float, probability: float) -> Rule:
        return cls(
            steps=[Step(start=low, probability=probability), Step(start=high, probability=1.0)]
        )

    def probability_at(self, score: float) -> float:
        """P(action | score): the probability of the last step at or below ``score``."""
        p = 0.0
        for step in self.steps:
            if score >= step.start:
                p = step.probability
            else:
                break
        return p

    def describe(self) -> str:
        """The rule in words, for diffs and reports."""
        parts: list[str] = []
        for i, step in enumerate(self.steps):
            upper = self.steps[i + 1].start if i + 1 < len(self.steps) else None
            where = (
                f"score >= {step.start:g}"
                if upper is None
                else (f"{step.start:g} <= score < {upper:g}")
            )
            if step.probability == 1.0:
                parts.append(f"always act at {where}")
            elif step.probability == 0.0:
                parts.append(f"never act at {where}")
            else:
                parts.append(f"act with probability {step.probability:g} at {where}")
        first = self.steps[0].start
        return f"never act below {first:g}; " + "; ".join(parts)


class Costs(StrictModel):
    """Error costs the policy was derived with (per case, in any one unit)."""

    false_positive: Cost
    false_negative: Cost

    @model_validator(mode="after")
    def _not_both_zero(self) -> Self:
        if self.false_positive == 0 and self.false_negative == 0:
            raise ValueError("costs: false_positive and false_negative cannot both be 0")
        return self


class Fallback(StrictModel):
    """What to do for a group without a rule of its own.

    Tried in order: the parent group (drop attributes from the right, so
    ``quarry-hill|es`` falls back to ``quarry-hill``) when ``use_parent`` is set, then the
    ``default`` rule when there is one. If neither gives a rule the evaluation is refused.
    ``unknown_groups`` says whether a group that is not in ``groups.known`` may fall back at
    all, or is refused outright.
    """

    use_parent: bool = False
    default: Rule | None = None
    unknown_groups: Literal["fallback", "refuse"] = "refuse"


class Groups(StrictModel):
    attributes: list[Slug] = Field(
        min_length=1, max_length=MAX_ATTRIBUTES, description="request attributes forming the key"
    )
    known: list[GroupKey] = Field(
        min_length=1,
        description="group keys: attribute values in their canonical reading (text, NFC, no "
        "surrounding white space), joined by '|'",
    )
    fallback: Fallback = Fallback()

    @field_validator("attributes")
    @classmethod
    def _unique_attributes(cls, attributes: list[str]) -> list[str]:
        if len(set(attributes)) != len(attributes):
            raise ValueError("groups.attributes: each attribute may appear only once")
        return attributes

    @model_validator(mode="after")
    def _known_keys_match_attributes(self) -> Self:
        seen: set[str] = set()
        for i, key in enumerate(self.known):
            parts = key.split(GROUP_SEPARATOR)
            if len(parts) != len(self.attributes) or any(not p for p in parts):
                raise ValueError(
                    f"groups.known[{i}] ({key!r}) must have one non-empty value per attribute "
                    f"{self.attributes}, joined by {GROUP_SEPARATOR!r}"
                )
            for part in parts:
                if not is_canonical(part):
                    raise ValueError(
                        f"groups.known[{i}] ({key!r}): the value {part!r} "
                        f"{_canonical_hint(part)}, so no request could ever be in this group"
                    )
            if key in seen:
                raise ValueError(f"groups.known[{i}] ({key!r}) is listed twice")
            seen.add(key)
        return self


class AuditPlan(StrictModel):
    """How the audit decides statuses for this policy: part of what is approved."""

    level: float = Field(
        default=0.05,
        gt=0.0,
        le=0.2,
        description="error rate controlled over each month's family of checks",
    )
    multiplicity: Literal["holm", "benjamini-yekutieli"] = Field(
        default="holm",
        description="holm: family-wise error rate (Holm 1979); benjamini-yekutieli: false "
        "discovery rate under any dependence (Benjamini & Yekutieli 2001)",
    )
    maturity_share: Probability = Field(
        default=0.9,
        description="a month is mature once this share of its observable decisions has an outcome",
    )
    maturity_days: int = Field(
        default=60,
        ge=0,
        le=3660,
        description="... or once this many days have passed since the month ended",
    )


class PolicyDocument(StrictModel):
    """One policy: how a score becomes a recommendation, for every group."""

    name: Slug
    description: Prose = ""
    score_meaning: Prose = Field(
        description="what the score estimates, e.g. P(readmission in 30 d)"
    )
    score_range: tuple[ScoreValue, ScoreValue] = (0.0, 1.0)
    action_label: Label
    no_action_label: Label
    favourable: Literal["action", "no-action"] = Field(
        description="which outcome of the decision is favourable to the person"
    )
    outcome_observed_after: Literal["both", "action", "no-action"] = Field(
        default="both",
        description="after which decisions the outcome can be observed (selective labels)",
    )
    costs: Costs
    groups: Groups
    rules: dict[GroupKey, Rule] = Field(description="group key (or parent key) -> rule")
    targets: Targets | None = None
    audit: AuditPlan | None = Field(
        default=None, description="how the audit decides statuses (default: AuditPlan())"
    )

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        low, high = self.score_range
        if not low < high:
            raise ValueError(f"score_range: low ({low}) must be below high ({high})")
        n_attr = len(self.groups.attributes)
        known = set(self.groups.known)
        named = dict(self.rules)
        if self.groups.fallback.default is not None:
            named["fallback.default"] = self.groups.fallback.default
        for key, rule in named.items():
            where = "groups.fallback.default" if key == "fallback.default" else f"rules[{key!r}]"
            if key != "fallback.default":
                parts = key.split(GROUP_SEPARATOR)
                is_parent = len(parts) < n_attr and any(
                    k.split(GROUP_SEPARATOR)[: len(parts)] == parts for k in known
                )
                if key not in known and not is_parent:
                    raise ValueError(
                        f"{where}: not a known group (groups.known) nor the parent of one"
                    )
            for i, step in enumerate(rule.steps):
                if not low <= step.start <= high:
                    raise ValueError(
                        f"{where}.steps[{i}].from ({step.start}) is outside "
                        f"score_range [{low}, {high}]"
                    )
        for key in self.groups.known:
            if resolve_rule_key(self, key) is None:
                raise ValueError(
                    f"groups.known: {key!r} has no rule and no fallback reaches one "
                    "(add rules[...], groups.fallback.use_parent or groups.fallback.default)"
                )
        if self.targets is not None:
            for key in self.targets.groups:
                if key not in known:
                    raise ValueError(f"targets.groups[{key!r}]: not a known group")
            ref = self.targets.reference_group
            if ref is not None and ref not in known:
                raise ValueError(f"targets.reference_group ({ref!r}) is not a known group")
        return self

    @property
    def audit_plan(self) -> AuditPlan:
        """The audit plan, with the documented defaults when the document sets none."""
        return self.audit if self.audit is not None else AuditPlan()

    def group_key(self, attributes: Mapping[str, object]) -> str:
        """The group key for a request's attributes (only the policy's attributes count).

        Each value is read by :func:`service.policy.attributes.read_attribute`, the reading the
        API and the calibration CSV loader use too.
        """
        from service.policy.errors import InvalidAttribute, MissingAttribute

        values: list[str] = []
        for attr in self.groups.attributes:
            raw = attributes.get(attr)
            if raw is None:
                raise MissingAttribute(
                    f"attribute {attr!r} is required by policy {self.name!r}",
                    field=f"attributes.{attr}",
                )
            try:
                values.append(read_attribute(raw))
            except AttributeProblem as exc:
                raise InvalidAttribute(
                    f"attribute {attr!r} {exc}", field=f"attributes.{attr}"
                ) from None
        key = GROUP_SEPARATOR.join(values)
        if len(key) > MAX_GROUP_KEY_CHARS:
            raise InvalidAttribute(
                f"the group key of these attributes is longer than {MAX_GROUP_KEY_CHARS} "
                "characters, longer than any group can be",
                field="attributes",
            )
        return key


def _canonical_hint(value: str) -> str:
    try:
        return f"is read as {read_attribute(value)!r}"
    except AttributeProblem as exc:
        return str(exc)


def resolve_rule_key(policy: PolicyDocument, group: str) -> str | None:
    """Which rule applies to ``group``: its own key, a parent key, ``"default"`` or None."""
    if group in policy.rules:
        return group
    fallback = policy.groups.fallback
    if group not in policy.groups.known and fallback.unknown_groups == "refuse":
        return None
    if fallback.use_parent:
        parts = group.split(GROUP_SEPARATOR)
        for length in range(len(parts) - 1, 0, -1):
            parent = GROUP_SEPARATOR.join(parts[:length])
            if parent in policy.rules:
                return parent
    if fallback.default is not None:
        return DEFAULT_RULE_KEY
    return None


DEFAULT_RULE_KEY = "default"
"""The ``rule`` reported when the fallback default rule was used."""


def canonical_json(value: Any) -> bytes:
    """Compact, key-sorted JSON bytes: the form hashes are computed over."""
    return json.dumps(
        value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    ).encode("utf-8")


def document_json(policy: PolicyDocument) -> dict[str, Any]:
    """The document as plain JSON data, with the public field names (``from``)."""
    return policy.model_dump(mode="json", by_alias=True, exclude_none=True)


def content_hash(policy: PolicyDocument) -> str:
    """SHA-256 hex digest of the canonical JSON of the document."""
    return hashlib.sha256(canonical_json(document_json(policy))).hexdigest()
