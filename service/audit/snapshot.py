"""Assembling a report snapshot from counts: the published, JSON-able content of one audit run.

Input are the true counts per (version, group) cell; statuses are decided on them. The output
is what may be published: small counts as ``"<11"``, complementary counts and every rate,
gap, ratio and cost that could reveal a small count withheld. The layout is documented in
``docs/audit.md`` ("Snapshot layout"); :data:`SNAPSHOT_FORMAT` names its version.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from service.policy.document import Criterion, PolicyDocument, canonical_json
from service.policy.realized import (
    GAP_METRICS,
    CellCounts,
    Rate,
    ShadowCounts,
    cost_per_case,
    four_fifths,
    fraction_of,
    gap,
    rates,
    reference_group,
    shadow_rates,
)
from service.policy.realized import (
    SHADOW_RATE_FRACTIONS as SHADOW_FRACTIONS,
)
from service.policy.statuses import (
    ALERTING,
    DEFAULT_MIN_COUNT,
    SEVERITY,
    Status,
    classify,
    four_fifths_status,
)
from service.policy.suppression import SMALL_CELL_LIMIT, Visibility, published, suppress
from service.stats.proportions import newcombe_difference_interval

SNAPSHOT_FORMAT = "evenhand.audit-snapshot/1"

CRITERION_METRICS: dict[str, tuple[str, ...]] = {
    Criterion.MAX_UTILITY: (),
    Criterion.SINGLE_CUT: (),
    Criterion.DEMOGRAPHIC_PARITY: ("action_rate",),
    Criterion.EQUAL_OPPORTUNITY: ("tpr",),
    Criterion.PREDICTIVE_EQUALITY: ("fpr",),
    Criterion.EQUALIZED_ODDS: ("tpr", "fpr"),
    Criterion.FOUR_FIFTHS: (),
}
"""Which gaps to the reference group each criterion bounds by its tolerance."""

PROMISED_METRICS = ("action_rate", "tpr", "fpr")
TREND_METRICS = ("action_rate", "tpr", "fpr", "ppv")
TREND_MONTHS = 12

METRIC_LABELS = {
    "action_rate": "action rate",
    "favourable_rate": "favourable rate",
    "coverage": "outcome coverage",
    "prevalence": "prevalence",
    "tpr": "TPR",
    "fpr": "FPR",
    "fnr": "FNR",
    "ppv": "PPV",
    "npv": "NPV",
    "override_rate": "override rate",
    "differ_rate": "share decided differently",
    "four_fifths_ratio": "four-fifths ratio",
}

CAUTIONS = (
    "Recommendations are advisory. A person makes the decision and may override it; overrides "
    "are recorded and counted in this report.",
    "Setting different thresholds by a protected attribute is unlawful in some sectors and "
    "places (in US employment testing, 42 U.S.C. 2000e-2(l) forbids different cutoff scores by "
    "race, colour, religion, sex or national origin; credit has rules of its own). Choose "
    "criteria with qualified counsel and follow local law and licensed practice.",
    "Parity criteria conflict with each other and with calibration: a policy that meets one "
    "may break another.",
    "Outcomes known only after some decisions (selective labels) bias realized rates. Outcome "
    "coverage is shown for every group; rates that cannot be identified are marked as such.",
    'Only the attributes the policy needs are stored. Counts from 1 to 10 are shown as "<11", '
    "and figures from which they could be worked out are withheld.",
)

CALIBRATION_CONFLICT = (
    "This report shows predictive values (PPV, NPV) next to error rates (TPR, FPR). When "
    "prevalence differs between groups, equal predictive values and equal error rates cannot "
    "both hold, except for a perfect predictor (Kleinberg, Mullainathan & Raghavan 2016; "
    "Chouldechova 2017: FPR = p/(1-p) x (1-PPV)/PPV x (1-FNR) within each group, p the "
    "prevalence). A gap in one is not by itself a fault if the policy targets the other."
)

_CELL_RELATIONS: tuple[tuple[str, tuple[str, ...]], ...] = (
    ("n", ("actions", "no_actions")),
    ("n", ("observed", "unobserved")),
    ("observed", ("positives", "negatives")),
    ("positives", ("tp", "fn")),
    ("negatives", ("fp", "tn")),
    ("observed_actions", ("tp", "fp")),
    ("observed_no_actions", ("fn", "tn")),
    ("observed", ("observed_actions", "observed_no_actions")),
    ("finals", ("overrides", "followed")),
)
_SHADOW_RELATIONS: tuple[tuple[str, tuple[str, ...]], ...] = (
    ("n", ("actions", "no_actions")),
    ("n", ("differs", "agrees")),
    ("observed", ("positives", "negatives")),
    ("positives", ("tp", "fn")),
    ("negatives", ("fp", "tn")),
    ("observed_actions", ("tp", "fp")),
    ("observed_no_actions", ("fn", "tn")),
    ("observed", ("observed_actions", "observed_no_actions")),
)
_TOTALLED = ("n", "observed", "finals")


@dataclass(frozen=True)
class VersionCounts:
    """The counts of one policy version in the month's cohort."""

    version: int
    document: PolicyDocument
    cells: Mapping[str, CellCounts]
    shadows: Mapping[int, Mapping[str, ShadowCounts]] = field(default_factory=dict)


@dataclass(frozen=True)
class AuditInput:
    policy: str
    month: str
    time_zone: str
    cohort_from: datetime
    cohort_until: datetime
    created_at: datetime
    code_version: str
    versions: Sequence[VersionCounts]
    reference_group: str | None = None
    tolerance: float | None = None
    """The auditor's tolerance for every check; None: each version's ``targets.tolerance``."""
    min_count: int = DEFAULT_MIN_COUNT
    history: Sequence[Mapping[str, Any]] = ()
    """Earlier snapshots of the same policy (latest per month), for the 12-month trend."""


def _interval(value: float | None, low: float | None, high: float | None) -> dict[str, Any]:
    return {"value": value, "low": low, "high": high}


def _withheld(reason: str) -> dict[str, Any]:
    return {"value": None, "low": None, "high": None, "withheld": reason}


def _rate_json(r: Rate, hidden: bool) -> dict[str, Any]:
    if r.missing is not None:
        return _withheld(r.missing)
    if hidden:
        return _withheld("small-cell")
    return _interval(r.value, r.low, r.high)


class _Cells:
    """Visibility of every count of a version: its cells, totals and shadow cells."""

    def __init__(self, v: VersionCounts) -> None:
        values: dict[tuple[str, ...], int] = {}
        relations: list[tuple[tuple[str, ...], list[tuple[str, ...]]]] = []
        for g, cell in v.cells.items():
            for name, value in cell.all_counts().items():
                values[("cell", g, name)] = value
            for parent, children in _CELL_RELATIONS:
                relations.append((("cell", g, parent), [("cell", g, c) for c in children]))
        for name in _TOTALLED:
            values[("total", name)] = sum(c.all_counts()[name] for c in v.cells.values())
            relations.append((("total", name), [("cell", g, name) for g in v.cells]))
        for sv, cells in v.shadows.items():
            for g, sc in cells.items():
                key = f"shadow-{sv}"
                for name, value in sc.all_counts().items():
                    values[(key, g, name)] = value
                for parent, children in _SHADOW_RELATIONS:
                    relations.append(((key, g, parent), [(key, g, c) for c in children]))
        self.values = values
        self.visibility = suppress(values, relations)

    def hidden(self, *key: str) -> bool:
        return self.visibility[key] is not Visibility.SHOWN

    def shown(self, *key: str) -> int | str | None:
        return published(self.values[key], self.visibility[key])


def _message(check: dict[str, Any]) -> str:
    metric = METRIC_LABELS.get(check["metric"], check["metric"])
    status = check["status"]
    group, against = check["group"], check["against"]
    if check["check"] == "promise":
        what = f"{metric} of {group} vs the rate version {check['version']} promised"
    elif check["check"] == "four-fifths":
        what = f"favourable rate of {group} vs the highest ({against})"
    else:
        what = f"{metric} gap of {group} vs {against}"
    if status == Status.TOO_FEW:
        return f"{what}: too few cases to decide (a denominator is below {check['min_count']})"
    if status == Status.NOT_IDENTIFIABLE:
        return f"{what}: not identifiable, outcomes are observed only after some decisions"
    if check.get("withheld"):
        figures = "figures withheld (small cells)"
    elif check["check"] == "four-fifths":
        figures = f"ratio {check['ratio']:.3f}"
    else:
        figures = (
            f"{check['value']:+.3f} (95% CI {check['low']:+.3f} to {check['high']:+.3f}), "
            f"tolerance {check['tolerance']:g}"
        )
    return f"{what}: {status}; {figures}"


def _version_json(v: VersionCounts, inp: AuditInput) -> dict[str, Any]:
    doc = v.document
    targets = doc.targets
    tolerance = (targets.tolerance or 0.0) if targets is not None else 0.0
    if inp.tolerance is not None:
        tolerance = inp.tolerance
    criterion = str(targets.criterion) if targets is not None else None
    fav, obs = doc.favourable, doc.outcome_observed_after
    cells = _Cells(v)
    group_names = sorted(v.cells)
    sizes = {g: v.cells[g].n for g in group_names}
    ref = reference_group(sizes, inp.reference_group)
    all_rates = {g: rates(v.cells[g], fav, obs) for g in group_names}

    def rate_hidden(g: str, metric: str) -> bool:
        num, den = fraction_of(metric, fav)
        return cells.hidden("cell", g, num) or cells.hidden("cell", g, den)

    fav_fractions = {g: (v.cells[g].favourable(fav), v.cells[g].n) for g in group_names}
    ff = four_fifths(fav_fractions)
    top = next(iter(ff.values())).highest_group
    fav_num = fraction_of("favourable_rate", fav)[0]

    groups_json: list[dict[str, Any]] = []
    for g in group_names:
        cell = v.cells[g]
        rj = {m: _rate_json(r, rate_hidden(g, m)) for m, r in all_rates[g].items()}
        gaps: dict[str, Any] = {}
        for m in GAP_METRICS:
            if g == ref:
                continue
            gp = gap(all_rates[g][m], all_rates[ref][m])
            if all_rates[g][m].missing or all_rates[ref][m].missing:
                gaps[m] = _withheld(all_rates[g][m].missing or all_rates[ref][m].missing or "")
            elif rate_hidden(g, m) or rate_hidden(ref, m):
                gaps[m] = _withheld("small-cell")
            else:
                gaps[m] = _interval(gp.value, gp.low, gp.high)
        ff_hidden = any(cells.hidden("cell", x, name) for x in (g, top) for name in (fav_num, "n"))
        cost = cost_per_case(
            cell,
            doc.costs.false_positive,
            doc.costs.false_negative,
            targets.expected_cost if targets is not None else None,
            obs,
        )
        cost_hidden = any(cells.hidden("cell", g, c) for c in ("fp", "fn", "observed"))
        target = targets.groups.get(g) if targets is not None else None
        groups_json.append(
            {
                "group": g,
                "reference": g == ref,
                "counts": {name: cells.shown("cell", g, name) for name in cell.all_counts()},
                "rates": rj,
                "gaps": gaps,
                "four_fifths": {
                    "ratio": None if ff_hidden else ff[g].ratio,
                    "flagged": ff[g].flagged,
                    **({"withheld": "small-cell"} if ff_hidden else {}),
                },
                "cost_per_case": {
                    "realized": None if cost_hidden else cost.realized,
                    "expected": None if cost_hidden else cost.expected,
                    "promised": cost.promised,
                    **({"withheld": "small-cell"} if cost_hidden and obs == "both" else {}),
                    **({"withheld": "not-identifiable"} if obs != "both" else {}),
                },
                "promised": None
                if target is None
                else {m: getattr(target, m) for m in PROMISED_METRICS},
            }
        )

    checks = _checks(v, inp, cells, all_rates, ref, ff, fav_fractions, rate_hidden, tolerance)

    shadows_json = []
    for sv in sorted(v.shadows):
        sgroups = []
        for g in sorted(v.shadows[sv]):
            sc = v.shadows[sv][g]
            key = f"shadow-{sv}"
            srates = shadow_rates(sc, obs)
            sgroups.append(
                {
                    "group": g,
                    "counts": {name: cells.shown(key, g, name) for name in sc.all_counts()},
                    "rates": {
                        m: _rate_json(
                            r,
                            cells.hidden(key, g, SHADOW_FRACTIONS[m][0])
                            or cells.hidden(key, g, SHADOW_FRACTIONS[m][1]),
                        )
                        for m, r in srates.items()
                    },
                }
            )
        shadows_json.append({"version": sv, "groups": sgroups})

    return {
        "version": v.version,
        "content_hash": None,
        "criterion": criterion,
        "tolerance": tolerance,
        "policy_tolerance": targets.tolerance if targets is not None else None,
        "favourable": fav,
        "outcome_observed_after": obs,
        "action_label": doc.action_label,
        "no_action_label": doc.no_action_label,
        "costs": {
            "false_positive": doc.costs.false_positive,
            "false_negative": doc.costs.false_negative,
        },
        "reference_group": ref,
        "highest_favourable_group": top,
        "totals": {name: cells.shown("total", name) for name in _TOTALLED},
        "groups": groups_json,
        "shadows": shadows_json,
        "checks": checks,
    }


def _checks(
    v: VersionCounts,
    inp: AuditInput,
    cells: _Cells,
    all_rates: dict[str, dict[str, Rate]],
    ref: str,
    ff: Mapping[str, Any],
    fav_fractions: dict[str, tuple[int, int]],
    rate_hidden: Any,
    tolerance: float,
) -> list[dict[str, Any]]:
    doc = v.document
    targets = doc.targets
    criterion = targets.criterion if targets is not None else None
    checks: list[dict[str, Any]] = []

    def add(check: dict[str, Any]) -> None:
        check.setdefault("version", v.version)
        check.setdefault("min_count", inp.min_count)
        check["message"] = _message(check)
        checks.append(check)

    for m in CRITERION_METRICS.get(criterion or "", ()):
        for g in sorted(v.cells):
            if g == ref:
                continue
            rg, rr = all_rates[g][m], all_rates[ref][m]
            base = {
                "check": "parity",
                "criterion": str(criterion),
                "metric": m,
                "group": g,
                "against": ref,
                "tolerance": tolerance,
            }
            if rg.missing == "not-identifiable":
                add({**base, "status": Status.NOT_IDENTIFIABLE.value})
                continue
            if min(rg.denominator, rr.denominator) < inp.min_count:
                add({**base, "status": Status.TOO_FEW.value})
                continue
            gp = gap(rg, rr)
            assert gp.value is not None and gp.low is not None and gp.high is not None
            status = classify(gp.value, gp.low, gp.high, tolerance)
            hidden = rate_hidden(g, m) or rate_hidden(ref, m)
            add({**base, "status": status.value, **_figures(gp.value, gp.low, gp.high, hidden)})

    if targets is not None:
        for g in sorted(targets.groups):
            if g not in v.cells:
                continue
            target = targets.groups[g]
            for m in PROMISED_METRICS:
                r = all_rates[g][m]
                promised = float(getattr(target, m))
                base = {
                    "check": "promise",
                    "criterion": str(criterion),
                    "metric": m,
                    "group": g,
                    "against": "promised",
                    "promised": promised,
                    "tolerance": tolerance,
                }
                if r.missing == "not-identifiable":
                    add({**base, "status": Status.NOT_IDENTIFIABLE.value})
                    continue
                if r.denominator < inp.min_count:
                    add({**base, "status": Status.TOO_FEW.value})
                    continue
                assert r.value is not None and r.low is not None and r.high is not None
                d, lo, hi = r.value - promised, r.low - promised, r.high - promised
                status = classify(d, lo, hi, tolerance)
                add({**base, "status": status.value, **_figures(d, lo, hi, rate_hidden(g, m))})

    top = next(iter(ff.values())).highest_group if ff else None
    fav_num = fraction_of("favourable_rate", doc.favourable)[0]
    for g in sorted(v.cells):
        if top is None or g == top:
            continue
        base = {
            "check": "four-fifths",
            "criterion": str(criterion),
            "metric": "four_fifths_ratio",
            "group": g,
            "against": top,
            "tolerance": 0.2,
        }
        (k, n), (km, nm) = fav_fractions[g], fav_fractions[top]
        if min(n, nm) < inp.min_count:
            add({**base, "status": Status.TOO_FEW.value})
            continue
        _, high = newcombe_difference_interval(k, n, km, nm)
        status = four_fifths_status(ff[g].flagged, high)
        hidden = any(cells.hidden("cell", x, c) for x in (g, top) for c in (fav_num, "n"))
        add(
            {
                **base,
                "status": status.value,
                "ratio": None if hidden else ff[g].ratio,
                "flagged": ff[g].flagged,
                **({"withheld": "small-cell"} if hidden else {}),
            }
        )
    return checks


def _figures(value: float, low: float, high: float, hidden: bool) -> dict[str, Any]:
    if hidden:
        return {"value": None, "low": None, "high": None, "withheld": "small-cell"}
    return {"value": value, "low": low, "high": high}


def _primary_version(snapshot: Mapping[str, Any]) -> Mapping[str, Any] | None:
    """The version with the most recommendations in a snapshot (it carries the month's trend)."""
    best: Mapping[str, Any] | None = None
    best_n = -1
    for v in snapshot.get("versions", []):
        n = sum(int(g["counts"]["n"]) for g in v["groups"] if isinstance(g["counts"]["n"], int))
        if n > best_n:
            best, best_n = v, n
    return best


def _trend(current: Mapping[str, Any], history: Sequence[Mapping[str, Any]]) -> list[Any]:
    by_month = {s["month"]: s for s in history if s.get("month") != current["month"]}
    by_month[current["month"]] = current
    months = sorted(by_month)[-TREND_MONTHS:]
    points: list[dict[str, Any]] = []
    for month in months:
        v = _primary_version(by_month[month])
        if v is None:
            continue
        for g in v["groups"]:
            for m in TREND_METRICS:
                gp = g["gaps"].get(m)
                if gp is None:
                    continue
                points.append(
                    {
                        "month": month,
                        "version": v["version"],
                        "group": g["group"],
                        "against": v["reference_group"],
                        "metric": m,
                        "value": gp["value"],
                        "low": gp["low"],
                        "high": gp["high"],
                    }
                )
    return points


def _alerts(versions: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    alerting = {s.value for s in ALERTING}
    found = [c for v in versions for c in v["checks"] if c["status"] in alerting]
    found.sort(key=lambda c: (SEVERITY[Status(c["status"])], c["version"], c["group"]))
    return [
        {
            "status": c["status"],
            "version": c["version"],
            "check": c["check"],
            "metric": c["metric"],
            "group": c["group"],
            "against": c["against"],
            "message": c["message"],
        }
        for c in found
    ]


def digest(snapshot: Mapping[str, Any]) -> str:
    """SHA-256 of the canonical JSON of the snapshot without its ``digest`` field."""
    content = {k: v for k, v in snapshot.items() if k != "digest"}
    return hashlib.sha256(canonical_json(content)).hexdigest()


def build_snapshot(inp: AuditInput, content_hashes: Mapping[int, str] | None = None) -> Any:
    """The snapshot dict of one audit run; ``digest`` is set last, over everything else."""
    versions = [_version_json(v, inp) for v in sorted(inp.versions, key=lambda v: v.version)]
    for vj in versions:
        vj["content_hash"] = (content_hashes or {}).get(vj["version"])
    cautions = list(CAUTIONS)
    shows_both = any(
        g["rates"]["ppv"].get("withheld") is None and g["rates"]["tpr"].get("withheld") is None
        for v in versions
        for g in v["groups"]
    )
    if shows_both:
        cautions.append(CALIBRATION_CONFLICT)
    totals = {name: 0 for name in _TOTALLED}
    for v in inp.versions:
        for cell in v.cells.values():
            for name in _TOTALLED:
                totals[name] += cell.all_counts()[name]
    snapshot: dict[str, Any] = {
        "format": SNAPSHOT_FORMAT,
        "policy": inp.policy,
        "month": inp.month,
        "time_zone": inp.time_zone,
        "cohort": {"from": inp.cohort_from.isoformat(), "until": inp.cohort_until.isoformat()},
        "created_at": inp.created_at.isoformat(),
        "code_version": inp.code_version,
        "settings": {
            "min_count": inp.min_count,
            "small_cell_limit": SMALL_CELL_LIMIT,
            "reference_group": inp.reference_group,
            "tolerance": inp.tolerance,
        },
        "row_counts": {
            "recommendations": _total_shown(totals["n"], versions, "n"),
            "outcomes": _total_shown(totals["observed"], versions, "observed"),
            "final_decisions": _total_shown(totals["finals"], versions, "finals"),
        },
        "versions_covered": [v["version"] for v in versions],
        "versions": versions,
        "alerts": _alerts(versions),
        "cautions": cautions,
    }
    snapshot["trend"] = _trend(snapshot, inp.history)
    snapshot["digest"] = digest(snapshot)
    return snapshot


def _total_shown(total: int, versions: Sequence[Mapping[str, Any]], name: str) -> int | str | None:
    """The grand total across versions, hidden like any count, and when exactly one version
    total is hidden (it would follow from the grand total minus the others)."""
    vis = [v["totals"][name] for v in versions]
    hidden = sum(1 for x in vis if not isinstance(x, int))
    if hidden == 1 and len(vis) > 1:
        return None
    if 0 < total < SMALL_CELL_LIMIT:
        return "<11"
    return total
