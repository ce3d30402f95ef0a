"""The diff in words, for changes beyond one rule's steps."""

from __future__ import annotations

from service.policy.document import PolicyDocument
from service.store.policy_diff import diff_documents
from tests.helpers import make_policy


def _doc(**overrides: object) -> PolicyDocument:
    return PolicyDocument.model_validate(make_policy(**overrides))


def test_groups_fallback_and_effective_rules() -> None:
    before = _doc()
    after = _doc(
        groups={
            "attributes": ["region"],
            "known": ["north", "south", "east"],
            "fallback": {"default": {"steps": [{"from": 0.5, "probability": 1.0}]}},
        },
        rules={"north": {"steps": [{"from": 0.3, "probability": 1.0}]}},
    )
    texts = [c.text for c in diff_documents(before, after)]
    assert "group 'east' added" in texts
    assert (
        "the fallback default rule added: never act below 0.5; always act at score >= 0.5" in texts
    )
    assert any(t.startswith("rule for 'south' removed (was: never act below 0.2;") for t in texts)
    assert "group 'south' now uses rule 'default' instead of 'south'" in texts
    assert not any("'north'" in t for t in texts)  # unchanged
    assert diff_documents(after, after) == []
