"""The derive report: plain JSON data about a derived policy, built from the solution."""

from __future__ import annotations

import math
from typing import Any

from service.policy.derive import (
    POOLED_UNIT,
    ComparisonRow,
    Prepared,
    Solution,
)
from service.policy.document import PolicyDocument, content_hash, resolve_rule_key
from service.policy.holdout import HoldoutGroup, RateWithInterval

CAUTIONS = (
    "Recommendations are advisory: a person decides and can override, and the service "
    "records overrides.",
    "Using a protected attribute to set different thresholds is unlawful in some sectors and "
    "places (in US employment testing, 42 U.S.C. 2000e-2(l) forbids different cutoff scores by "
    "race, colour, religion, sex or national origin; credit has its own rules). Choose criteria "
    "with qualified counsel and follow local law and licensed practice.",
    "Parity criteria conflict with each other and with calibration; a policy that meets one may "
    "break another. When prevalences differ, equal error rates and equal PPV cannot both hold "
    "(Chouldechova 2017; Kleinberg, Mullainathan & Raghavan 2016): this report shows both.",
    "The rates here are expected rates on calibration data. If outcomes are observed only after "
    "some decisions (selective labels), later realized rates are biased; audits show coverage.",
    "Store only the attributes the policy needs. This report is for the policy's authors: it "
    "lists every calibration group with its size; do not publish cells of 1 to 10 cases.",
)


def _num(value: float) -> float | None:
    """JSON has no NaN: an undefined rate (e.g. PPV of a rule that never acts) is null."""
    return None if math.isnan(value) else value


def _interval(rate: RateWithInterval) -> dict[str, Any]:
    return {"value": rate.value, "low": rate.low, "high": rate.high, "trials": rate.trials}


def build_report(
    prepared: Prepared,
    solution: Solution,
    policy: PolicyDocument,
    comparison: list[ComparisonRow],
    frontier: list[tuple[float, float | None]],
    holdout: tuple[list[HoldoutGroup], float, float, int] | None = None,
) -> dict[str, Any]:
    groups: dict[str, Any] = {}
    for g in solution.groups:
        c = g.counts
        groups[g.key] = {
            "n": g.n,
            "prevalence": _num(float(c.prevalence[0])),
            "action_rate": _num(float(c.action_rate[0])),
            "tpr": _num(float(c.tpr[0])),
            "fpr": _num(float(c.fpr[0])),
            "ppv": _num(float(c.ppv[0])),
            "npv": _num(float(c.npv[0])),
            "rule": resolve_rule_key(policy, g.key),
        }
    rules = {
        key: {"text": rule.describe(), "steps": [s.model_dump(by_alias=True) for s in rule.steps]}
        for key, rule in solution.rules.items()
    }
    if POOLED_UNIT in rules:
        rules = {"everyone": rules[POOLED_UNIT]}
    report: dict[str, Any] = {
        "policy": policy.name,
        "policy_hash": content_hash(policy),  # ties the report to the exact document
        "criterion": solution.criterion.value,
        "tolerance": solution.tolerance,
        "favourable": policy.favourable,
        "costs": {
            "false_positive": policy.costs.false_positive,
            "false_negative": policy.costs.false_negative,
        },
        "rows": len(prepared.data.scores),
        "expected_cost": solution.expected_cost,
        "groups": groups,
        "rules": rules,
        "comparison": [
            {
                "criterion": r.criterion.value,
                "expected_cost": r.expected_cost,
                "price": r.price,
                **({"note": r.note} if r.note else {}),
            }
            for r in comparison
        ],
        "frontier": {
            "criterion": solution.criterion.value,
            "points": [{"tolerance": t, "expected_cost": c} for t, c in frontier],
        },
        # One rule for everyone needs no fallback; the notes belong to the per-group criteria.
        "fallbacks": [] if POOLED_UNIT in solution.rules else list(prepared.notes),
        "cautions": list(CAUTIONS),
    }
    if holdout is not None:
        held, cost, fraction, seed = holdout
        report["holdout"] = {
            "fraction": fraction,
            "seed": seed,
            "rows": sum(h.n for h in held),
            "expected_cost": cost,
            "note": "rates of the fitted rules on held-out rows (exact sums of probabilities), "
            "Wilson 95% intervals",
            "groups": {
                h.key: {
                    "n": h.n,
                    "action_rate": _interval(h.action_rate),
                    "tpr": _interval(h.tpr),
                    "fpr": _interval(h.fpr),
                }
                for h in held
            },
        }
    return report
