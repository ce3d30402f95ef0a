"""Assembling the report snapshots of one audit run from counts (pure: no database).

Input are the true counts per (version, group) cell. Statuses are decided on them
(:mod:`service.audit.verdicts`), the charts across months continue from the earlier months'
counts (:mod:`service.audit.monitoring`), and two views are built: the *published* one, where
small counts show as ``"<11"`` and every figure that could reveal one is withheld
(:mod:`service.audit.published_counts`), and the *internal* one with every count.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime

from service.audit.check_rows import check_row, family_text
from service.audit.evidence_rows import calibration_rows, design_text, monitor_rows
from service.audit.group_rows import group_rows, shadow_sections
from service.audit.maturity import Maturity, month_maturity
from service.audit.monitoring import Monitor, MonthCounts, version_monitors
from service.audit.month import Month
from service.audit.published_counts import TOTALLED, CountVisibility
from service.audit.snapshot_model import (
    AlertRow,
    Cohort,
    Costs,
    FamilySection,
    MaturitySection,
    PublishedCount,
    RunSettings,
    Snapshot,
    VersionSection,
)
from service.audit.suppression import SMALL_CELL_LIMIT
from service.audit.verdicts import Check, Family, MonthContext, Status, decide
from service.audit.version_checks import version_checks
from service.audit.version_counts import VersionCounts
from service.audit.version_settings import VersionSettings, resolve_settings, strictest_plan
from service.policy.document import AuditPlan

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
    history: Mapping[int, Sequence[MonthCounts]] = field(default_factory=dict)
    """Per version, its earlier months (oldest first) that the charts continue from."""


@dataclass(frozen=True)
class AuditResult:
    published: Snapshot
    internal: Snapshot
    checks: list[Check]
    """Every check with its true figures and decided status."""


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
    monitors = {
        v.version: version_monitors(
            v.version,
            v.document,
            settings[v.version],
            [
                *inp.history.get(v.version, ()),
                MonthCounts(inp.month, maturity.mature, v.cells, v.scores),
            ],
            plan.level,
        )
        for v in inp.versions
    }
    state = _MonthState(settings, plan, decided, family, maturity, context, monitors)
    views = [_snapshot(inp, state, suppressing) for suppressing in (True, False)]
    return AuditResult(views[0], views[1], decided)


@dataclass(frozen=True)
class _MonthState:
    """Everything decided about the month, shared by the two views."""

    settings: Mapping[int, VersionSettings]
    plan: AuditPlan
    checks: Sequence[Check]
    family: Family
    maturity: Maturity
    context: MonthContext
    monitors: Mapping[int, Sequence[Monitor]]


def _section(
    inp: AuditInput, v: VersionCounts, state: _MonthState, suppressing: bool
) -> tuple[VersionSection, list[AlertRow]]:
    s = state.settings[v.version]
    doc = v.document
    bins = {g: ss.bin_counts for g, ss in v.scores.items()}
    vis = CountVisibility(v.cells, v.shadows, suppressing, bins)
    rows = [check_row(c, doc, vis, inp.min_count) for c in state.checks if c.version == v.version]
    alerts = [
        AlertRow(
            level="breach",
            version=row.version,
            check=row.check,
            metric=row.metric,
            group=row.group,
            against=row.against,
            message=row.message,
        )
        for row in rows
        if row.status == Status.BREACH.value
    ]
    month_visibility = {
        str(m.month): CountVisibility(m.cells, {}, suppressing)
        for m in inp.history.get(v.version, ())
    }
    month_visibility[str(inp.month)] = vis
    monitors = state.monitors[v.version]
    charts, watch = monitor_rows(v.version, monitors, month_visibility)
    calibration, calibration_family = calibration_rows(
        v, vis, state.plan, state.context.decide_outcomes, inp.min_count
    )
    targets = doc.targets
    promises = "none"
    if targets is not None and targets.groups:
        two = any(t.out_of_sample is not None for t in targets.groups.values())
        promises = "two-sample" if two else "exact"
    section = VersionSection(
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
            false_positive=doc.costs.false_positive, false_negative=doc.costs.false_negative
        ),
        reference_group=s.reference_group,
        reference_source=s.reference_source,
        comparator_group=s.comparator_group,
        comparator_source=s.comparator_source,
        promises=promises,
        totals={name: vis.shown("total", name) for name in TOTALLED},
        groups=group_rows(v, s, vis),
        shadows=shadow_sections(v, vis),
        checks=rows,
        calibration=calibration,
        calibration_family=calibration_family,
        monitoring=charts,
        monitoring_design=design_text(monitors, state.plan.level),
    )
    return section, alerts + watch


def _snapshot(inp: AuditInput, state: _MonthState, suppressing: bool) -> Snapshot:
    sections: list[VersionSection] = []
    alerts: list[AlertRow] = []
    for v in sorted(inp.versions, key=lambda x: x.version):
        section, found = _section(inp, v, state, suppressing)
        sections.append(section)
        alerts.extend(found)
    alerts.sort(key=lambda a: (a.level != "breach", a.version, a.group, a.metric))
    cautions = list(CAUTIONS)
    if any(
        g.rates["ppv"].value is not None and g.rates["tpr"].value is not None
        for sec in sections
        for g in sec.groups
    ):
        cautions.append(CALIBRATION_CONFLICT)
    totals = {name: 0 for name in TOTALLED}
    for v in inp.versions:
        for cell in v.cells.values():
            for name in TOTALLED:
                totals[name] += cell.all_counts()[name]
    maturity = state.maturity
    outcome_checks = (
        "decided"
        if maturity.mature
        else ("decided provisionally" if inp.provisional else "pending")
    )
    # Under selective labels the observable decisions are a sum of per-group counts that may
    # be hidden: publish only the share, rounded, and never the two counts it comes from.
    selective = any(v.document.outcome_observed_after != "both" for v in inp.versions)
    hide_maturity_counts = suppressing and selective
    share = maturity.share
    procedures = {c.evidence.procedure.value for c in state.checks if c.evidence is not None}
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
            observable=None
            if hide_maturity_counts
            else _total_count(maturity.observable, suppressing),
            observed=None if hide_maturity_counts else _total_count(maturity.observed, suppressing),
            share=None if share is None else (round(share, 2) if hide_maturity_counts else share),
            required_share=maturity.required_share,
            mature_after=maturity.mature_after.isoformat(),
            outcome_checks=outcome_checks,
        ),
        family=FamilySection(
            method=state.family.method,
            level=state.family.level,
            tests=state.family.tests,
            description=family_text(state.family, procedures),
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
