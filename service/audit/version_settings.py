"""What one version's checks are decided against, and where each setting came from.

Tolerance: the auditor's, else the version's ``targets.tolerance``, else the documented
default (only for versions stored before a positive tolerance was required). Reference group:
the auditor's, else the version's, else the largest calibration group, else the largest group
this month. Four-fifths comparator: the configured reference, else the calibration group with
the highest favourable rate -- never the month's own noisy maximum.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from service.audit.realized import CellCounts, Favourable
from service.policy.document import AuditPlan, PolicyDocument
from service.policy.targets import GroupTarget

DEFAULT_TOLERANCE = 0.05
"""Used only for a stored version whose targets carry no positive tolerance (new versions are
refused at submit); every report says when it was used."""


@dataclass(frozen=True, slots=True)
class VersionSettings:
    """What one version's checks are decided against, and where each setting came from."""

    tolerance: float
    tolerance_source: str  # "auditor", "version" or "default"
    reference_group: str | None
    reference_source: str
    comparator_group: str | None
    comparator_source: str
    plan: AuditPlan


def resolve_settings(
    document: PolicyDocument,
    cells: Mapping[str, CellCounts],
    reference_override: str | None,
    tolerance_override: float | None,
) -> VersionSettings:
    """Tolerance, reference group and four-fifths comparator of one version."""
    targets = document.targets
    if tolerance_override is not None:
        tolerance, t_source = tolerance_override, "auditor"
    elif targets is not None and targets.tolerance:
        tolerance, t_source = float(targets.tolerance), "version"
    else:
        tolerance, t_source = DEFAULT_TOLERANCE, "default"

    calibration_n = {
        g: t.n for g, t in (targets.groups.items() if targets else ()) if t.n is not None
    }
    if reference_override is not None:
        reference, r_source = reference_override, "auditor"
    elif targets is not None and targets.reference_group is not None:
        reference, r_source = targets.reference_group, "version"
    elif calibration_n:
        reference = min(calibration_n, key=lambda g: (-calibration_n[g], g))
        r_source = "largest calibration group"
    elif cells:
        reference = min(cells, key=lambda g: (-cells[g].n, g))
        r_source = "largest group this month"
    else:
        reference, r_source = None, "none"

    favourable = document.favourable
    if reference_override is not None or (targets and targets.reference_group):
        comparator, c_source = reference, r_source
    elif targets is not None and targets.groups:
        comparator = max(
            sorted(targets.groups),
            key=lambda g: _favourable_rate(targets.groups[g], favourable),
        )
        c_source = "highest favourable rate in calibration"
    else:
        comparator, c_source = None, "none"
    return VersionSettings(
        tolerance, t_source, reference, r_source, comparator, c_source, document.audit_plan
    )


def _favourable_rate(target: GroupTarget, favourable: Favourable) -> float:
    rate = float(target.action_rate)
    return rate if favourable == "action" else 1.0 - rate


def strictest_plan(plans: Sequence[AuditPlan]) -> AuditPlan:
    """One plan for a month several versions decided in: the lowest level, Holm if any version
    asks for it (family-wise control is the stronger promise), the longest maturity."""
    if not plans:
        return AuditPlan()
    return AuditPlan(
        level=min(p.level for p in plans),
        multiplicity="holm"
        if any(p.multiplicity == "holm" for p in plans)
        else "benjamini-yekutieli",
        maturity_share=max(p.maturity_share for p in plans),
        maturity_days=max(p.maturity_days for p in plans),
    )
