"""Risk-adjusted charts of a group's outcomes against its scores, across months.

Where the score is a probability (score range [0, 1]), two risk-adjusted Bernoulli CUSUM
charts per group (Steiner, Cook, Farewell & Treasure 2000) weigh the outcomes against the
scores themselves: odds of the outcome doubled (above) or halved (below) against the odds the
score states. They watch the model's calibration drifting within a group, the most common
reason for a rate to drift; their limits come from the month's increment distribution computed
from the group's score bins.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from service.audit.charts import chart_side, limit_for
from service.audit.monitoring_types import Monitor, MonthCounts, MonthEstimate
from service.audit.verdicts import CheckKind
from service.stats.cusum import risk_adjusted_llr, risk_adjusted_step_distribution
from service.stats.proportions import Z95

ODDS = (("above", 2.0), ("below", 0.5))
"""The risk-adjusted charts: odds of the outcome doubled or halved against the score's."""


def outcome_monitor(
    version: int, g: str, history: Sequence[MonthCounts], false_alarm: float
) -> Monitor | None:
    used = [(str(m.month), m.scores[g]) for m in history if m.mature and g in m.scores]
    used = [(month, ss) for month, ss in used if ss.power.n > 0]
    if not used:
        return None
    months = tuple(month for month, _ in used)
    counts = np.sum([ss.bin_counts for _, ss in used], axis=0)
    sums = np.sum([ss.bin_score_sums for _, ss in used], axis=0)
    filled = counts > 0
    risks = sums[filled] / counts[filled]
    per_month = np.maximum(np.rint(counts[filled] / len(used)), 0).astype(np.int64)
    if per_month.sum() == 0:
        per_month[np.argmax(counts[filled])] = 1
    sides = []
    for side, odds in ODDS:
        terms = [ss.log_double if odds == 2.0 else ss.log_half for _, ss in used]
        increments = [
            risk_adjusted_llr(ss.power.sum_y, term, odds)
            for (_, ss), term in zip(used, terms, strict=True)
        ]
        limit = limit_for(risk_adjusted_step_distribution(risks, per_month, odds), false_alarm)
        sides.append(chart_side(side, 1.0, odds, increments, months, limit))
    estimates = []
    for month, ss in used:
        p = ss.power
        # Observed minus expected outcome rate, with a normal interval from the variance the
        # scores imply (sum of p(1 - p)): descriptive.
        half = Z95 * math.sqrt(max(p.sum_p - p.sum_p2, 0.0)) / p.n
        value = (p.sum_y - p.sum_p) / p.n
        estimates.append(MonthEstimate(month, value, value - half, value + half))
    return Monitor(
        version,
        CheckKind.CALIBRATION,
        "outcome_vs_score",
        g,
        "score",
        months,
        tuple(sides),
        tuple(estimates),
        None,
        None,
        ((g, "observed"), (g, "positives"), (g, "negatives")),
    )
