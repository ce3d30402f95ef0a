"""Validation errors of a policy document name the field to fix."""

from __future__ import annotations

from typing import Any

import pytest
from pydantic import ValidationError

from service.policy.document import PolicyDocument


def make_policy(**overrides: Any) -> dict[str, Any]:
    doc: dict[str, Any] = {
        "name": "p",
        "score_meaning": "P(y)",
        "action_label": "act",
        "no_action_label": "wait",
        "favourable": "action",
        "costs": {"false_positive": 1, "false_negative": 4},
        "groups": {"attributes": ["community"], "known": ["a", "b"]},
        "rules": {
            "a": {"steps": [{"from": 0.2, "probability": 1}]},
            "b": {"steps": [{"from": 0.3, "probability": 1}]},
        },
    }
    doc.update(overrides)
    return doc


def _error(doc: dict[str, Any]) -> str:
    with pytest.raises(ValidationError) as info:
        PolicyDocument.model_validate(doc)
    return str(info.value)


def test_valid_document() -> None:
    PolicyDocument.model_validate(make_policy())


def test_non_monotone_steps_name_the_step() -> None:
    rules = {
        "a": {"steps": [{"from": 0.2, "probability": 0.8}, {"from": 0.3, "probability": 0.5}]},
        "b": {"steps": [{"from": 0.3, "probability": 1}]},
    }
    msg = _error(make_policy(rules=rules))
    assert "rules.a.steps" in msg and "steps[1].probability" in msg


def test_unordered_breakpoints_name_the_step() -> None:
    rules = {
        "a": {"steps": [{"from": 0.4, "probability": 0.5}, {"from": 0.3, "probability": 1}]},
        "b": {"steps": [{"from": 0.3, "probability": 1}]},
    }
    assert "steps[1].from" in _error(make_policy(rules=rules))


def test_probability_outside_unit_interval_names_the_field() -> None:
    rules = {
        "a": {"steps": [{"from": 0.2, "probability": 1.5}]},
        "b": {"steps": [{"from": 0.3, "probability": 1}]},
    }
    assert "rules.a.steps.0.probability" in _error(make_policy(rules=rules))


def test_breakpoint_outside_score_range_names_the_rule() -> None:
    rules = {
        "a": {"steps": [{"from": 1.2, "probability": 1}]},
        "b": {"steps": [{"from": 0.3, "probability": 1}]},
    }
    assert "rules['a'].steps[0].from" in _error(make_policy(rules=rules))


def test_group_without_rule_or_fallback_is_named() -> None:
    rules = {"a": {"steps": [{"from": 0.2, "probability": 1}]}}
    assert "'b' has no rule" in _error(make_policy(rules=rules))


def test_unknown_field_is_named() -> None:
    assert "colour" in _error(make_policy(colour="red"))
