"""The check rows of a version's month and their messages, the alerts, and the family text."""

from __future__ import annotations

from service.audit.published_counts import CountVisibility
from service.audit.snapshot_model import Band, CheckRow, Estimate, EvidenceRow, Withheld
from service.audit.verdicts import PROCEDURES, Check, CheckKind, Family, Status
from service.policy.document import PolicyDocument

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
    "outcome_vs_score": "outcomes vs scores",
}

_UNTESTED_TEXT = {
    Status.TOO_FEW: "too-few: not tested, a denominator is below {min_count}",
    Status.NOT_IDENTIFIABLE: "not-identifiable: outcomes are observed only after some decisions",
    Status.PENDING: "pending: the month's outcomes are not mature yet",
    Status.OUTSIDE_PROMISE: "outside-promise (recorded in the version: {reason})",
}
"""Each untested status's message, led by the status as the JSON, CSV and HTML write it."""


def what_is_checked(c: Check) -> str:
    metric = METRIC_LABELS.get(c.metric, c.metric)
    if c.kind is CheckKind.PROMISE:
        return f"{metric} of {c.group} vs the rate version {c.version} promised"
    if c.kind is CheckKind.FOUR_FIFTHS:
        return f"favourable-rate ratio of {c.group} to {c.against}"
    return f"{metric} gap of {c.group} vs {c.against}"


def _message(c: Check, hidden: bool, min_count: int, reason: str | None) -> str:
    what = what_is_checked(c)
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


def check_row(c: Check, doc: PolicyDocument, vis: CountVisibility, min_count: int) -> CheckRow:
    hidden = vis.any_hidden(c.figures_from)
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


def family_text(family: Family, procedures: set[str]) -> str:
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
