"""The pipeline's one evaluation step: requests of one version are evaluated one by one when
few and in one numpy pass when many; both must give every request the same decision and the
same refusal, in the order the engine checks (score, attributes, rule). The reference is the
engine's own scalar ``evaluate`` on each request alone."""

from __future__ import annotations

import random
from typing import Any

import pytest

from service.api.recommendation_schemas import RecommendationRequest
from service.policy.document import PolicyDocument
from service.policy.errors import PolicyError
from service.policy.rules import evaluate
from service.store.decision_pipeline import VECTORISED_FROM, evaluate_requests
from tests.helpers import TEST_SECRET, make_policy, make_request

SECRET = TEST_SECRET.encode()


def _requests(n: int, seed: int) -> list[RecommendationRequest]:
    rng = random.Random(seed)
    out = []
    for _ in range(n):
        kind = rng.randrange(6)
        attributes: dict[str, Any] = {"region": rng.choice(["north", "south"])}
        score = rng.random()
        if kind == 0:
            score = 1.5  # outside the score range
        elif kind == 1:
            attributes = {"region": "east"}  # no rule, and no fallback
        elif kind == 2:
            attributes = {}  # the policy's attribute is missing
        elif kind == 3:
            score, attributes = -1.0, {}  # two problems: the score is checked first
        out.append(
            RecommendationRequest.model_validate(make_request(score=score, attributes=attributes))
        )
    return out


def _alone(doc: PolicyDocument, req: RecommendationRequest) -> Any:
    try:
        return evaluate(doc, 3, req.score, dict(req.attributes), req.case_id, SECRET)
    except PolicyError as exc:
        return exc


@pytest.mark.parametrize("n", [1, VECTORISED_FROM - 1, VECTORISED_FROM, 500])
def test_few_and_many_decide_as_each_request_alone(n: int) -> None:
    doc = PolicyDocument.model_validate(make_policy())
    reqs = _requests(n, seed=n)
    got = evaluate_requests(doc, 3, reqs, SECRET)
    assert len(got) == n
    for req, result in zip(reqs, got, strict=True):
        expected = _alone(doc, req)
        if isinstance(expected, PolicyError):
            assert isinstance(result, PolicyError)
            assert (type(result), result.code, result.message, result.field) == (
                type(expected),
                expected.code,
                expected.message,
                expected.field,
            )
        else:
            assert result == expected  # the same floats, bit for bit, and the same labels
    assert any(isinstance(r, PolicyError) for r in got) or n == 1
    assert any(not isinstance(r, PolicyError) for r in got) or n == 1
