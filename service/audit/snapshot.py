"""Assembling the report snapshots of one audit run from counts (pure: no database).

Input are the true counts per (version, group) cell. Statuses are decided on them
(:mod:`service.audit.verdicts`), then two views are built: the *published* one, where small
counts show as ``"<11"`` and every figure that could reveal one is withheld
(:mod:`service.audit.suppression`), and the *internal* one with every count, for the audit role.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime

from service.audit.maturity import Maturity, month_maturity
from service.audit.month import Month
from service.audit.realized import (
    GAP_METRICS,
    CellCounts,
    Rate,
    ShadowCounts,
    cost_per_case,
    four_fifths_flag,
    fraction_of,
    gap,
    rates,
    shadow_rates,
)
from service.audit.realized import SHADOW_RATE_FRACTIONS as SHADOW_FRACTIONS
from service.audit.snapshot_model import (
    AlertRow,
    Band,
    CheckRow,
    Cohort,
    CostFigures,
    Costs,
    Estimate,
    EvidenceRow,
    FamilySection,
    FourFifthsFigures,
    GroupRow,
    MaturitySection,
    PublishedCount,
    RunSettings,
    ShadowGroup,
    ShadowSection,
    Snapshot,
    VersionSection,
    Withheld,
)
from service.audit.suppression import SMALL_CELL_LIMIT, Visibility, published, suppress
from service.audit.verdicts import (
    PROCEDURES,
    Check,
    CheckKind,
    Family,
    MonthContext,
    Status,
    VersionSettings,
    decide,
    resolve_settings,
    strictest_plan,
    version_checks,
)
from service.policy.document import GroupTarget, PolicyDocument
from service.stats.ratios import katz_ratio_interval

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
    "Intervals are 95% intervals of each figure on its own; statuses come from the tests "
    "named in the family section, adjusted for the number of checks.",
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
    content_hash: str | None = None


@dataclass(frozen=True)
class AuditInput:
    policy: str
    month: Month
    time_zone: str
    cohort_from: datetime
    cohort_until: datetime
    created_at: datetime
    code_version: str
    versions: Sequence[VersionCounts]
    reference_group: str | None = None
    """The auditor's reference group for every version (None: each version's own)."""
    tolerance: float | None = None
    """The auditor's tolerance for every check (None: each version's ``targets.tolerance``)."""
    min_count: int = 20
    provisional: bool = False
    """Decide outcome-based checks even when the month is not mature (the report says so)."""


@dataclass(frozen=True)
class AuditResult:
    published: Snapshot
    internal: Snapshot
    checks: list[Check]
    """Every check with its true figures and decided status."""


class _Visibility:
    """Which counts of a version may be published (all of them in the internal view)."""

    def __init__(self, v: VersionCounts, suppressing: bool) -> None:
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
        if suppressing:
            self.visibility = suppress(values, relations)
        else:
            self.visibility = dict.fromkeys(values, Visibility.SHOWN)

    def hidden(self, *key: str) -> bool:
        return self.visibility[key] is not Visibility.SHOWN

    def shown(self, *key: str) -> PublishedCount:
        value = published(self.values[key], self.visibility[key])
        return value if value is None or isinstance(value, int) else "<11"

    def any_hidden(self, figures: Sequence[tuple[str, str]]) -> bool:
        return any(self.hidden("cell", g, name) for g, name in figures)


def _estimate(r: Rate, hidden: bool) -> Estimate:
    if r.missing is not None:
        return Estimate(
            withheld="not-identifiable" if r.missing == "not-identifiable" else "no-cases"
        )
    if hidden:
        return Estimate(withheld="small-cell")
    return Estimate(value=r.value, low=r.low, high=r.high)


def _promised_cost(document: PolicyDocument, target: GroupTarget | None) -> float | None:
    """The group's own promised cost per case: from its out-of-sample counts, else from its
    promised prevalence, TPR and FPR."""
    if target is None:
        return None
    c_fp, c_fn = document.costs.false_positive, document.costs.false_negative
    c = target.out_of_sample
    if c is not None:
        return (c_fp * c.fp + c_fn * (c.positives - c.tp)) / c.n
    if target.prevalence is None:
        return None
    p = float(target.prevalence)
    return c_fp * (1 - p) * float(target.fpr) + c_fn * p * (1 - float(target.tpr))


def _group_rows(v: VersionCounts, s: VersionSettings, vis: _Visibility) -> list[GroupRow]:
    doc = v.document
    fav, obs = doc.favourable, doc.outcome_observed_after
    targets = doc.targets
    names = sorted(v.cells)
    all_rates = {g: rates(v.cells[g], fav, obs) for g in names}
    ref, comp = s.reference_group, s.comparator_group
    fav_num = fraction_of("favourable_rate", fav)[0]

    def rate_hidden(g: str, metric: str) -> bool:
        num, den = fraction_of(metric, fav)
        return vis.hidden("cell", g, num) or vis.hidden("cell", g, den)

    rows: list[GroupRow] = []
    for g in names:
        cell = v.cells[g]
        gaps: dict[str, Estimate] = {}
        if ref is not None and ref in v.cells and g != ref:
            for m in GAP_METRICS:
                rg, rr = all_rates[g][m], all_rates[ref][m]
                missing = rg.missing or rr.missing
                if missing:
                    gaps[m] = _estimate(Rate(0, 0, None, None, None, missing), False)
                elif rate_hidden(g, m) or rate_hidden(ref, m):
                    gaps[m] = Estimate(withheld="small-cell")
                else:
                    gp = gap(rg, rr)
                    gaps[m] = Estimate(value=gp.value, low=gp.low, high=gp.high)
        ff = None
        if comp is not None and comp in v.cells:
            k, n = cell.favourable(fav), cell.n
            kc, nc = v.cells[comp].favourable(fav), v.cells[comp].n
            hidden = vis.any_hidden([(g, fav_num), (g, "n"), (comp, fav_num), (comp, "n")])
            if hidden:
                ratio = Estimate(withheld="small-cell")
            elif kc == 0:
                ratio = Estimate(withheld="no-cases")
            else:
                low, high = katz_ratio_interval(k, n, kc, nc)
                ratio = Estimate(value=(k / n) / (kc / nc), low=low, high=high)
            ff = FourFifthsFigures(
                against=comp,
                ratio=ratio,
                flagged=None if hidden else four_fifths_flag(k, n, kc, nc),
            )
        target = targets.groups.get(g) if targets is not None else None
        cost = cost_per_case(
            cell,
            doc.costs.false_positive,
            doc.costs.false_negative,
            _promised_cost(doc, target),
            obs,
        )
        withheld: Withheld | None = None
        if obs != "both":
            withheld = "not-identifiable"
        elif vis.any_hidden([(g, "fp"), (g, "fn"), (g, "observed")]):
            withheld = "small-cell"
        rows.append(
            GroupRow(
                group=g,
                reference=g == ref,
                comparator=g == comp,
                outside_promise=target.outside_promise if target is not None else None,
                counts={name: vis.shown("cell", g, name) for name in cell.all_counts()},
                rates={m: _estimate(r, rate_hidden(g, m)) for m, r in all_rates[g].items()},
                gaps=gaps,
                four_fifths=ff,
                cost_per_case=CostFigures(
                    realized=None if withheld else cost.realized,
                    expected=None if withheld else cost.expected,
                    promised=cost.promised,
                    withheld=withheld,
                ),
                promised=None
                if target is None
                else {m: float(getattr(target, m)) for m in ("action_rate", "tpr", "fpr")},
            )
        )
    return rows


def _shadow_sections(v: VersionCounts, vis: _Visibility) -> list[ShadowSection]:
    obs = v.document.outcome_observed_after
    sections = []
    for sv in sorted(v.shadows):
        key = f"shadow-{sv}"
        groups = []
        for g in sorted(v.shadows[sv]):
            sc = v.shadows[sv][g]
            srates = shadow_rates(sc, obs)
            groups.append(
                ShadowGroup(
                    group=g,
                    counts={name: vis.shown(key, g, name) for name in sc.all_counts()},
                    rates={
                        m: _estimate(
                            r,
                            vis.hidden(key, g, SHADOW_FRACTIONS[m][0])
                            or vis.hidden(key, g, SHADOW_FRACTIONS[m][1]),
                        )
                        for m, r in srates.items()
                    },
                )
            )
        sections.append(ShadowSection(version=sv, groups=groups))
    return sections


_UNTESTED_TEXT = {
    Status.TOO_FEW: "too few cases to test (a denominator is below {min_count})",
    Status.NOT_IDENTIFIABLE: "not identifiable: outcomes are observed only after some decisions",
    Status.PENDING: "pending: the month's outcomes are not mature yet",
    Status.OUTSIDE_PROMISE: "outside the promise (recorded in the version: {reason})",
}


def _what(c: Check) -> str:
    metric = METRIC_LABELS.get(c.metric, c.metric)
    if c.kind is CheckKind.PROMISE:
        return f"{metric} of {c.group} vs the rate version {c.version} promised"
    if c.kind is CheckKind.FOUR_FIFTHS:
        return f"favourable-rate ratio of {c.group} to {c.against}"
    return f"{metric} gap of {c.group} vs {c.against}"


def _message(c: Check, hidden: bool, min_count: int, reason: str | None) -> str:
    what = _what(c)
    if c.status in _UNTESTED_TEXT:
        text = _UNTESTED_TEXT[c.status].format(min_count=min_count, reason=reason or "")
        return f"{what}: {text}"
    ev = c.evidence
    assert ev is not None and ev.p_outside_adjusted is not None
    if hidden:
        return f"{what}: {c.status.value}; figures withheld (small cells)"
    if c.kind is CheckKind.FOUR_FIFTHS:
        figures = f"ratio {c.estimate:.3f} (95% CI {c.low:.3f} to {c.high:.3f}), line 0.8"
    elif c.kind is CheckKind.PROMISE:
        figures = (
            f"{c.estimate:.3f} (95% CI {c.low:.3f} to {c.high:.3f}), promised band "
            f"{c.band.low:.3f} to {c.band.high:.3f}"
        )
    else:
        figures = (
            f"{c.estimate:+.3f} (95% CI {c.low:+.3f} to {c.high:+.3f}), tolerance {c.band.high:g}"
        )
    p = ev.p_outside if c.status is Status.BREACH else ev.p_inside
    padj = ev.p_outside_adjusted if c.status is Status.BREACH else ev.p_inside_adjusted
    which = "breach" if c.status is Status.BREACH else "equivalence"
    return f"{what}: {c.status.value}; {figures}; {which} test p = {p:.2g}, adjusted {padj:.2g}"


def _check_row(c: Check, v: VersionCounts, vis: _Visibility, min_count: int) -> CheckRow:
    doc = v.document
    figures = [(g, name) for g, name in c.figures_from if g in v.cells]
    hidden = vis.any_hidden(figures)
    target = doc.targets.groups.get(c.group) if doc.targets is not None else None
    evidence = None
    if c.evidence is not None and not hidden:
        ev = c.evidence
        assert ev.p_inside_adjusted is not None and ev.p_outside_adjusted is not None
        evidence = EvidenceRow(
            procedure=ev.procedure.value,
            p_inside=ev.p_inside,
            p_inside_adjusted=ev.p_inside_adjusted,
            p_outside=ev.p_outside,
            p_outside_adjusted=ev.p_outside_adjusted,
            side="below" if ev.side == "below" else "above",
        )
    if c.estimate is None:
        estimate = Estimate(withheld=_untested_withheld(c.status))
    elif hidden:
        estimate = Estimate(withheld="small-cell")
    else:
        estimate = Estimate(value=c.estimate, low=c.low, high=c.high)
    return CheckRow(
        key=c.key,
        version=c.version,
        check=c.kind.value,
        criterion=doc.targets.criterion.value if doc.targets is not None else None,
        metric=c.metric,
        group=c.group,
        against=c.against,
        band=Band(low=c.band.low, high=c.band.high),
        estimate=estimate,
        status=c.status.value,
        evidence=evidence,
        message=_message(
            c, hidden, min_count, target.outside_promise if target is not None else None
        ),
    )


def _untested_withheld(status: Status) -> Withheld | None:
    if status is Status.NOT_IDENTIFIABLE:
        return "not-identifiable"
    if status is Status.PENDING:
        return "pending"
    if status is Status.TOO_FEW:
        return "no-cases"
    return None


def _family_text(family: Family, procedures: set[str]) -> str:
    method = (
        "Holm (1979), controlling the family-wise error rate"
        if family.method == "holm"
        else "Benjamini & Yekutieli (2001), controlling the false discovery rate"
    )
    used = "; ".join(PROCEDURES[p] for p in sorted(PROCEDURES) if p.value in procedures)
    return (
        f"Each tested check has two p-values: an equivalence test (two one-sided tests, "
        f"Schuirmann 1987) whose rejection shows the quantity inside its band (holds), and a "
        f"test whose rejection shows it outside (breach: the smaller one-sided p-value at the "
        f"nearer edge, doubled for the two directions; one-sided for the four-fifths line). "
        f"Tests used: {used or 'none'}. The breach p-values of the {family.tests} tested "
        f"check(s) of this policy and month form one family and the equivalence p-values "
        f"another; each is adjusted by {method}, at level {family.level:g}. A check is a "
        f"breach when its adjusted breach p-value is at most the level, holds when its "
        f"adjusted equivalence p-value is, and is undecided otherwise."
    )


def build(inp: AuditInput, now: datetime) -> AuditResult:
    """Decide every check of the month and build its published and internal snapshots."""
    settings = {
        v.version: resolve_settings(v.document, v.cells, inp.reference_group, inp.tolerance)
        for v in inp.versions
    }
    plan = strictest_plan([s.plan for s in settings.values()])
    maturity = month_maturity(
        [(c, v.document.outcome_observed_after) for v in inp.versions for c in v.cells.values()],
        plan,
        inp.cohort_until,
        inp.month.days_after_end(inp.time_zone, plan.maturity_days),
        now,
    )
    context = MonthContext(inp.min_count, maturity.mature or inp.provisional)
    checks: list[Check] = []
    for v in inp.versions:
        checks.extend(version_checks(v.version, v.document, v.cells, settings[v.version], context))
    decided, family = decide(checks, plan)
    views = [
        _snapshot(inp, settings, decided, family, maturity, suppressing)
        for suppressing in (True, False)
    ]
    return AuditResult(views[0], views[1], decided)


def _snapshot(
    inp: AuditInput,
    settings: Mapping[int, VersionSettings],
    checks: Sequence[Check],
    family: Family,
    maturity: Maturity,
    suppressing: bool,
) -> Snapshot:
    sections: list[VersionSection] = []
    alerts: list[AlertRow] = []
    for v in sorted(inp.versions, key=lambda x: x.version):
        s = settings[v.version]
        doc = v.document
        vis = _Visibility(v, suppressing)
        rows = [_check_row(c, v, vis, inp.min_count) for c in checks if c.version == v.version]
        for row in rows:
            if row.status == Status.BREACH.value:
                alerts.append(
                    AlertRow(
                        level="breach",
                        version=row.version,
                        check=row.check,
                        metric=row.metric,
                        group=row.group,
                        against=row.against,
                        message=row.message,
                    )
                )
        targets = doc.targets
        promises = "none"
        if targets is not None and targets.groups:
            two = any(t.out_of_sample is not None for t in targets.groups.values())
            promises = "two-sample" if two else "exact"
        sections.append(
            VersionSection(
                version=v.version,
                content_hash=v.content_hash,
                criterion=targets.criterion.value if targets is not None else None,
                tolerance=s.tolerance,
                tolerance_source=s.tolerance_source,
                favourable=doc.favourable,
                outcome_observed_after=doc.outcome_observed_after,
                action_label=doc.action_label,
                no_action_label=doc.no_action_label,
                costs=Costs(
                    false_positive=doc.costs.false_positive,
                    false_negative=doc.costs.false_negative,
                ),
                reference_group=s.reference_group,
                reference_source=s.reference_source,
                comparator_group=s.comparator_group,
                comparator_source=s.comparator_source,
                promises=promises,
                totals={name: vis.shown("total", name) for name in _TOTALLED},
                groups=_group_rows(v, s, vis),
                shadows=_shadow_sections(v, vis),
                checks=rows,
            )
        )
    cautions = list(CAUTIONS)
    if any(
        g.rates["ppv"].value is not None and g.rates["tpr"].value is not None
        for sec in sections
        for g in sec.groups
    ):
        cautions.append(CALIBRATION_CONFLICT)
    totals = {name: 0 for name in _TOTALLED}
    for v in inp.versions:
        for cell in v.cells.values():
            for name in _TOTALLED:
                totals[name] += cell.all_counts()[name]
    decided_provisionally = not maturity.mature and inp.provisional
    outcome_checks = (
        "decided"
        if maturity.mature
        else ("decided provisionally" if decided_provisionally else "pending")
    )
    procedures = {c.evidence.procedure.value for c in checks if c.evidence is not None}
    snapshot = Snapshot(
        view="published" if suppressing else "internal",
        policy=inp.policy,
        month=str(inp.month),
        time_zone=inp.time_zone,
        cohort=Cohort(from_=inp.cohort_from.isoformat(), until=inp.cohort_until.isoformat()),
        created_at=inp.created_at.isoformat(),
        code_version=inp.code_version,
        settings=RunSettings(
            min_count=inp.min_count,
            small_cell_limit=SMALL_CELL_LIMIT,
            reference_group=inp.reference_group,
            tolerance=inp.tolerance,
            provisional=inp.provisional,
        ),
        maturity=MaturitySection(
            state="mature" if maturity.mature else "provisional",
            reason=maturity.reason,
            observable=_total_count(maturity.observable, suppressing),
            observed=_total_count(maturity.observed, suppressing),
            share=maturity.share,
            required_share=maturity.required_share,
            mature_after=maturity.mature_after.isoformat(),
            outcome_checks=outcome_checks,
        ),
        family=FamilySection(
            method=family.method,
            level=family.level,
            tests=family.tests,
            description=_family_text(family, procedures),
        ),
        row_counts={
            "recommendations": _grand_total(totals["n"], sections, "n", suppressing),
            "outcomes": _grand_total(totals["observed"], sections, "observed", suppressing),
            "final_decisions": _grand_total(totals["finals"], sections, "finals", suppressing),
        },
        versions_covered=[s.version for s in sections],
        versions=sections,
        alerts=alerts,
        cautions=cautions,
    )
    return snapshot.sealed()


def _total_count(value: int, suppressing: bool) -> PublishedCount:
    if suppressing and 0 < value < SMALL_CELL_LIMIT:
        return "<11"
    return value


def _grand_total(
    total: int, sections: Sequence[VersionSection], name: str, suppressing: bool
) -> PublishedCount:
    """The total across versions, hidden like any count, and when exactly one version total is
    hidden (it would follow from the grand total minus the others)."""
    if not suppressing:
        return total
    shown = [s.totals[name] for s in sections]
    if sum(1 for x in shown if not isinstance(x, int)) == 1 and len(shown) > 1:
        return None
    return _total_count(total, suppressing)
