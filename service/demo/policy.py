"""The Fernhollow demo policy: the derived document the package ships, else a simple one.

``service/policies/fernhollow-follow-up.json`` (package data) is derived from the synthetic
calibration data by the policy engine. Without it, :func:`fallback_policy` builds a plain
per-community document in code so the demo still runs.
"""

from __future__ import annotations

import json
from typing import Any

from service.demo.fernhollow import COMMUNITIES, LANGUAGES
from service.policy.document import (
    Costs,
    Fallback,
    Groups,
    PolicyDocument,
    Rule,
    document_json,
)
from service.resources import policy_text

POLICY_NAME = "fernhollow-follow-up"
POLICY_FILE = f"{POLICY_NAME}.json"
COSTS = Costs(false_positive=1.0, false_negative=4.0)


def demo_policy() -> dict[str, Any]:
    """The document version 1 of the demo activates (validated)."""
    try:
        text = policy_text(POLICY_FILE)
    except FileNotFoundError:
        return document_json(fallback_policy())
    return document_json(PolicyDocument.model_validate(json.loads(text)))


def fallback_policy() -> PolicyDocument:
    # These cuts are picked by hand, not derived.
    return PolicyDocument(
        name=POLICY_NAME,
        description="Nurse follow-up after discharge (hand-set per-community cuts)",
        score_meaning="P(readmission within 30 days)",
        action_label="offer nurse follow-up",
        no_action_label="standard discharge",
        favourable="action",
        costs=COSTS,
        groups=Groups(
            attributes=["community", "language"],
            known=[f"{c}|{lang}" for c in COMMUNITIES for lang in LANGUAGES],
            fallback=Fallback(use_parent=True),
        ),
        rules={
            "quarry-hill": Rule.cut(0.2),
            "millbrook": Rule.cut(0.2),
            "saltmarsh": Rule.band(0.15, 0.3, 0.5),
        },
    )


def group_blind_variant(document: dict[str, Any]) -> dict[str, Any]:
    """Version 2 of the demo: one cut for everyone at the Bayes cut c_FP / (c_FP + c_FN)."""
    policy = PolicyDocument.model_validate(document)
    cut = policy.costs.false_positive / (policy.costs.false_positive + policy.costs.false_negative)
    variant = policy.model_copy(
        update={
            "description": f"Group-blind single cut at {cut:g} (Elkan 2001 cost-minimizing cut)",
            "rules": {},
            "targets": None,
            "groups": policy.groups.model_copy(
                update={
                    "fallback": Fallback(
                        use_parent=False, default=Rule.cut(cut), unknown_groups="refuse"
                    )
                }
            ),
        }
    )
    # Re-validate: model_copy skips validators.
    return document_json(PolicyDocument.model_validate(document_json(variant)))
