"""The per-group rows of a version's month: counts, rates, gaps, ratios, costs, shadows."""

from __future__ import annotations

from service.audit.published_counts import CountVisibility, estimate_of
from service.audit.realized import (
    GAP_METRICS,
    Rate,
    cost_per_case,
    four_fifths_flag,
    fraction_of,
    gap,
    rates,
    shadow_rates,
)
from service.audit.realized import SHADOW_RATE_FRACTIONS as SHADOW_FRACTIONS
from service.audit.snapshot_model import (
    CostFigures,
    Estimate,
    FourFifthsFigures,
    GroupRow,
    PartialRate,
    ScoreSumsRow,
    ShadowGroup,
    ShadowSection,
    Withheld,
)
from service.audit.version_counts import VersionCounts
from service.audit.version_settings import VersionSettings
from service.policy.document import PolicyDocument
from service.policy.targets import GroupTarget
from service.stats.ratios import katz_ratio_interval
from service.stats.selective_labels import selective_rates


def promised_cost(document: PolicyDocument, target: GroupTarget | None) -> float | None:
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


def group_rows(v: VersionCounts, s: VersionSettings, vis: CountVisibility) -> list[GroupRow]:
    """One row per group; in the internal view (nothing hidden) with the score sums too."""
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
                    gaps[m] = estimate_of(Rate(0, 0, None, None, None, missing), False)
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
            promised_cost(doc, target),
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
                rates={m: estimate_of(r, rate_hidden(g, m)) for m, r in all_rates[g].items()},
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
                partial_rates=_partial_rates(v, g, vis),
                score_sums=_score_sums(v, g) if not vis.suppressing else None,
            )
        )
    return rows


def _partial_rates(v: VersionCounts, g: str, vis: CountVisibility) -> dict[str, PartialRate] | None:
    counts = v.selective.get(g)
    if counts is None:
        return None
    hidden = vis.any_hidden([(g, name) for name in v.cells[g].all_counts()])
    out = {}
    for metric, r in selective_rates(counts).items():
        if hidden:
            out[metric] = PartialRate(
                kind=r.kind, value=None, low=None, high=None, note=r.note, withheld="small-cell"
            )
        else:
            out[metric] = PartialRate(
                kind=r.kind, value=r.value, low=r.low, high=r.high, note=r.note
            )
    return out


def _score_sums(v: VersionCounts, g: str) -> ScoreSumsRow | None:
    ss = v.scores.get(g)
    if ss is None:
        return None
    p = ss.power
    return ScoreSumsRow(
        n=p.n,
        sum_y=p.sum_y,
        sum_p=p.sum_p,
        sum_p2=p.sum_p2,
        sum_p3=p.sum_p3,
        sum_p4=p.sum_p4,
        sum_yp=p.sum_yp,
        log_double=ss.log_double,
        log_half=ss.log_half,
        bin_counts=list(ss.bin_counts),
        bin_positives=list(ss.bin_positives),
        bin_score_sums=list(ss.bin_score_sums),
    )


def shadow_sections(v: VersionCounts, vis: CountVisibility) -> list[ShadowSection]:
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
                        m: estimate_of(
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
