"""The derive report: plain JSON data about a derived policy, built from the solution."""

from __future__ import annotations

import math
from typing import Any

from service.policy.crossfit import CrossFitted, PriceRow
from service.policy.derive import Solution
from service.policy.document import PolicyDocument, content_hash, resolve_rule_key
from service.policy.promise_spread import PromiseSpread
from service.policy.rates import ExpectedCounts
from service.policy.units import POOLED_UNIT, Prepared
from service.stats.proportions import wilson_interval_for_rate

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
    "The promised rates are cross-fitted: expected rates of rules fitted without the rows they "
    "are checked on. If outcomes are observed only after some decisions (selective labels), "
    "later realized rates are biased; audits show coverage.",
    "Store only the attributes the policy needs. This report is for the policy's authors: it "
    "lists every calibration group with its size; do not publish cells of 1 to 10 cases.",
)

PRICE_NOTE = (
    "cost per case = (c_FP E[FP] + c_FN E[FN]) / N. In-sample: the rules on the rows they "
    "were fitted on. Cross-fitted: every row under rules fitted on the other folds; its 95% "
    "interval is the normal interval of the mean of the per-row expected costs (common "
    "practice). Price: cross-fitted cost minus max-utility's. Workload: the overall action "
    "rate. Per-group rates are cross-fitted, with Wilson 95% intervals (Wilson 1927)."
)


def _num(value: float) -> float | None:
    """JSON has no NaN: an undefined rate (e.g. PPV of a rule that never acts) is null."""
    return None if math.isnan(value) else value


def _interval(value: float, trials: int) -> dict[str, Any]:
    """A rate with its Wilson 95% interval over ``trials`` (rows, positives or negatives)."""
    if trials == 0 or math.isnan(value):
        return {"value": None, "low": None, "high": None, "trials": trials}
    rate = min(1.0, max(0.0, value))
    low, high = wilson_interval_for_rate(rate, trials)
    return {"value": rate, "low": low, "high": high, "trials": trials}


def cross_fitted_rates(cross: CrossFitted) -> dict[str, Any]:
    """Per group: cross-fitted action rate, TPR and FPR with Wilson 95% intervals."""
    counts = cross.counts()
    out: dict[str, Any] = {}
    for g, key in enumerate(cross.group_keys):
        n, pos = int(cross.n[g]), int(cross.positives[g])
        out[key] = {
            "action_rate": _interval(float(counts.action_rate[g]), n),
            "tpr": _interval(float(counts.tpr[g]), pos),
            "fpr": _interval(float(counts.fpr[g]), n - pos),
        }
    return out


def _in_sample(c: ExpectedCounts) -> dict[str, Any]:
    return {
        "action_rate": _num(float(c.action_rate[0])),
        "tpr": _num(float(c.tpr[0])),
        "fpr": _num(float(c.fpr[0])),
        "ppv": _num(float(c.ppv[0])),
        "npv": _num(float(c.npv[0])),
    }


def _price_rows(comparison: list[PriceRow], chosen: str) -> list[dict[str, Any]]:
    first = next((r for r in comparison if r.criterion.value == "max-utility"), None)
    base = None
    if first is not None and first.cross_fitted is not None:
        base = first.cross_fitted.cost_per_case
    rows: list[dict[str, Any]] = []
    for r in comparison:
        cross = r.cross_fitted
        low, high = cross.cost_interval() if cross is not None else (None, None)
        cost = cross.cost_per_case if cross is not None else None
        row: dict[str, Any] = {
            "criterion": r.criterion.value,
            "chosen": r.criterion.value == chosen,
            "in_sample_cost": r.in_sample.expected_cost if r.in_sample is not None else None,
            "cross_fitted_cost": cost,
            "cross_fitted_low": low,
            "cross_fitted_high": high,
            "price": None if cost is None or base is None else cost - base,
            "workload_in_sample": r.in_sample.action_rate if r.in_sample is not None else None,
            "workload_cross_fitted": cross.action_rate if cross is not None else None,
            "groups": cross_fitted_rates(cross) if cross is not None else {},
        }
        if r.note:
            row["note"] = r.note
        rows.append(row)
    return rows


def _units(prepared: Prepared, solution: Solution) -> list[dict[str, Any]]:
    units = [prepared.pooled] if POOLED_UNIT in solution.rules else prepared.units
    return [
        {
            "rule": "everyone" if u.key == POOLED_UNIT else u.key,
            "kind": u.kind,
            "fitted_on": {"groups": list(u.fitted_on), "rows": u.fitted_n},
            "governs": {"groups": list(u.members), "rows": u.governed_n},
        }
        for u in units
    ]


def build_report(
    prepared: Prepared,
    solution: Solution,
    policy: PolicyDocument,
    comparison: list[PriceRow],
    frontier: list[tuple[float, float | None]],
    *,
    cross: CrossFitted,
    folds_seed: int,
    warnings: list[str],
    spread: PromiseSpread | None = None,
    resamples_seed: int | None = None,
) -> dict[str, Any]:
    promised = cross_fitted_rates(cross)
    groups: dict[str, Any] = {}
    for g in solution.groups:
        counts = cross.group_counts(g.key)
        groups[g.key] = {
            "n": g.n,
            "prevalence": _num(float(g.counts.prevalence[0])),
            "rule": resolve_rule_key(policy, g.key),
            "in_sample": _in_sample(g.counts),
            "promised": promised[g.key],
            "out_of_sample": counts.model_dump(),
            "standard_errors": None if spread is None else spread.of(g.key),
            "outside_promise": solution.outside_promise.get(g.key),
        }
    rules = {
        key: {"text": rule.describe(), "steps": [s.model_dump(by_alias=True) for s in rule.steps]}
        for key, rule in solution.rules.items()
    }
    if POOLED_UNIT in rules:
        rules = {"everyone": rules[POOLED_UNIT]}
    low, high = cross.cost_interval()
    targets = policy.targets
    return {
        "policy": policy.name,
        "policy_hash": content_hash(policy),  # ties the report to the exact document
        "criterion": solution.criterion.value,
        "tolerance": solution.tolerance,
        "reference_group": solution.reference_group,
        "capacity": solution.capacity,
        "favourable": policy.favourable,
        "costs": {
            "false_positive": policy.costs.false_positive,
            "false_negative": policy.costs.false_negative,
        },
        "rows": prepared.n_rows,
        "folds": {
            "k": cross.folds,
            "seed": folds_seed,
            "stratified_by": ["group", "outcome"],
            "notes": list(cross.notes),
        },
        "resamples": None
        if spread is None
        else {
            "asked": spread.resamples,
            "used": spread.used,
            "seed": resamples_seed,
            "stratified_by": ["group"],
            "method": spread.method,
        },
        "expected_cost": cross.cost_per_case,
        "expected_cost_interval": [low, high],
        "in_sample_cost": solution.expected_cost,
        "workload": {"in_sample": solution.action_rate, "cross_fitted": cross.action_rate},
        "groups": groups,
        "units": _units(prepared, solution),
        "rules": rules,
        "price_of_parity": {
            "note": PRICE_NOTE,
            "rows": _price_rows(comparison, solution.criterion.value),
        },
        "frontier": {
            "criterion": solution.criterion.value,
            "points": [{"tolerance": t, "expected_cost": c} for t, c in frontier],
        },
        "score_edges": targets.score_edges if targets is not None else None,
        "warnings": list(warnings),
        # One rule for everyone needs no fallback; the notes belong to the per-group criteria.
        "fallbacks": [] if POOLED_UNIT in solution.rules else list(prepared.notes),
        "cautions": list(CAUTIONS),
    }
