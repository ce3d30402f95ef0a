"""What changed between two policy documents, section by section and rule by rule, in words
a reviewer can read (rules through :meth:`Rule.describe`). Pure: no database."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from service.policy.document import PolicyDocument, resolve_rule_key


@dataclass(frozen=True)
class Change:
    """One difference between two versions, in words a reviewer can read."""

    section: str
    before: str | None
    after: str | None
    text: str


def _q(value: Any) -> str:
    return repr(value) if isinstance(value, str) else str(value)


def diff_documents(a: PolicyDocument, b: PolicyDocument) -> list[Change]:
    changes: list[Change] = []

    def field(section: str, before: Any, after: Any, label: str) -> None:
        if before != after:
            changes.append(
                Change(
                    section,
                    _q(before),
                    _q(after),
                    f"{label} changed from {_q(before)} to {_q(after)}",
                )
            )

    field("description", a.description, b.description, "description")
    field("score_meaning", a.score_meaning, b.score_meaning, "score meaning")
    field("score_range", list(a.score_range), list(b.score_range), "score range")
    field("action_label", a.action_label, b.action_label, "action label")
    field("no_action_label", a.no_action_label, b.no_action_label, "no-action label")
    field("favourable", a.favourable, b.favourable, "favourable outcome")
    field(
        "outcome_observed_after",
        a.outcome_observed_after,
        b.outcome_observed_after,
        "outcomes observed after",
    )
    field(
        "costs.false_positive",
        a.costs.false_positive,
        b.costs.false_positive,
        "cost of a false positive",
    )
    field(
        "costs.false_negative",
        a.costs.false_negative,
        b.costs.false_negative,
        "cost of a false negative",
    )
    field("groups.attributes", a.groups.attributes, b.groups.attributes, "group attributes")

    known_a, known_b = set(a.groups.known), set(b.groups.known)
    for g in sorted(known_b - known_a):
        changes.append(Change(f"groups.known[{g!r}]", None, g, f"group {g!r} added"))
    for g in sorted(known_a - known_b):
        changes.append(Change(f"groups.known[{g!r}]", g, None, f"group {g!r} removed"))

    fa, fb = a.groups.fallback, b.groups.fallback
    field(
        "groups.fallback.use_parent", fa.use_parent, fb.use_parent, "fallback to the parent group"
    )
    field("groups.fallback.unknown_groups", fa.unknown_groups, fb.unknown_groups, "unknown groups")
    da = None if fa.default is None else fa.default.describe()
    db = None if fb.default is None else fb.default.describe()
    if da != db:
        changes.append(
            Change(
                "groups.fallback.default",
                da,
                db,
                _rule_change_text("the fallback default rule", da, db),
            )
        )

    for key in sorted(set(a.rules) | set(b.rules)):
        ra = a.rules[key].describe() if key in a.rules else None
        rb = b.rules[key].describe() if key in b.rules else None
        if ra != rb:
            changes.append(
                Change(f"rules[{key!r}]", ra, rb, _rule_change_text(f"rule for {key!r}", ra, rb))
            )

    # A group can change rule without its own rule changing (a fallback or parent rule moved).
    for g in sorted(known_a & known_b):
        ka, kb = resolve_rule_key(a, g), resolve_rule_key(b, g)
        if ka != kb:
            changes.append(
                Change(
                    f"groups.known[{g!r}]",
                    str(ka),
                    str(kb),
                    f"group {g!r} now uses rule {kb!r} instead of {ka!r}",
                )
            )

    ta = None if a.targets is None else a.targets.criterion.value
    tb = None if b.targets is None else b.targets.criterion.value
    field("targets.criterion", ta, tb, "criterion")
    tola = None if a.targets is None else a.targets.tolerance
    tolb = None if b.targets is None else b.targets.tolerance
    field("targets.tolerance", tola, tolb, "tolerance")
    return changes


def _rule_change_text(what: str, before: str | None, after: str | None) -> str:
    if before is None:
        return f"{what} added: {after}"
    if after is None:
        return f"{what} removed (was: {before})"
    return f"{what} changed: was {before}; now {after}"
