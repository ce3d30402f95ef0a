"""From an LP operating point to a rule: a mixture of cuts, written as a step function.

A point (FPR, TPR) between a unit's ROC hull and the chance diagonal is reached by mixing
cuts at random (Hardt, Price & Srebro 2016, "Equality of Opportunity in Supervised Learning",
NeurIPS, section 4). On the hull it is a band between the cuts of two adjacent vertices;
strictly inside it is a mixture of two such bands on a line of slope 1 through the point
(:func:`cut_mixture`). A mixture of cuts is a non-decreasing step function of the score
(:func:`rule_from_mixture`): P(action | s) = total weight of the cuts at or below s.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from service.policy.document import Rule, Step
from service.policy.roc import FloatArray, Hull


@dataclass(frozen=True)
class LpPoint:
    fpr: float
    tpr: float


def _on_line(hull: Hull, gain: FloatArray, k: int, level: float) -> tuple[float, float, float]:
    """Where segment (k, k+1) meets tpr - fpr = level: (fraction along it, fpr, tpr)."""
    g0, g1 = gain[k], gain[k + 1]
    frac = 0.0 if g1 == g0 else float(np.clip((level - g0) / (g1 - g0), 0.0, 1.0))
    f = hull.fpr[k] + frac * (hull.fpr[k + 1] - hull.fpr[k])
    t = hull.tpr[k] + frac * (hull.tpr[k + 1] - hull.tpr[k])
    return frac, float(f), float(t)


def cut_mixture(hull: Hull, point: LpPoint) -> list[tuple[float, float]]:
    """The point as a mixture of cuts: [(cut, weight)], weights summing to 1.

    The line tpr - fpr = const through the point meets the hull once where the hull rises
    above the diagonal (point A) and once where it falls back (point B); the point is
    between them, and each of A and B is a band between two adjacent vertices. On the hull
    the point is A or B itself, and the rule is a single band.
    """
    # The gain rises strictly, may stay level along one segment of slope 1 (the whole hull
    # when it is the chance diagonal: a group whose scores take one value), then falls
    # strictly. A is sought left of the first maximum, B right of the last one, so a level
    # segment is spanned by the pair (A, B) instead of being collapsed to one end. The
    # maxima are found on the exact integer gains: in floats, tpr - fpr at the two ends of
    # a level segment can differ by one unit in the last place, which made one end the only
    # maximum and moved every point along the segment to that end.
    exact = hull.gain_numerators
    gain = hull.gain
    first_peak = int(np.argmax(exact))
    last = len(exact) - 1
    last_peak = last - int(np.argmax(exact[::-1]))
    level = float(np.clip(point.tpr - point.fpr, 0.0, gain[first_peak]))
    if first_peak == 0:
        ka, frac_a, fa = 0, 0.0, float(hull.fpr[0])
    else:
        rising = gain[: first_peak + 1]
        ka = int(np.clip(np.searchsorted(rising, level, side="left") - 1, 0, first_peak - 1))
        frac_a, fa, _ = _on_line(hull, gain, ka, level)
    if last_peak == last:
        kb, frac_b, fb = last - 1, 1.0, float(hull.fpr[last])
    else:
        falling = gain[last_peak:][::-1]
        j = int(np.clip(np.searchsorted(falling, level, side="left") - 1, 0, len(falling) - 2))
        kb = last_peak + len(falling) - 2 - j
        frac_b, fb, _ = _on_line(hull, gain, kb, level)
    beta = 1.0 if fb - fa <= 1e-15 else float(np.clip((fb - point.fpr) / (fb - fa), 0.0, 1.0))
    mixture: dict[float, float] = {}
    for weight, k, frac in ((beta, ka, frac_a), (1.0 - beta, kb, frac_b)):
        for cut, w in ((hull.cuts[k], weight * (1.0 - frac)), (hull.cuts[k + 1], weight * frac)):
            # Weights below 1e-12 are rounding dust of beta or frac; they would only add
            # steps with probabilities like 1e-15 that change no rate measurably.
            if w > 1e-12 and np.isfinite(cut):
                mixture[float(cut)] = mixture.get(float(cut), 0.0) + w
    return sorted(mixture.items())


def rule_from_mixture(mixture: Sequence[tuple[float, float]], score_low: float) -> Rule:
    """A mixture of cuts as steps: P(action | s) = total weight of the cuts at or below s."""
    if not mixture:
        return Rule(steps=[Step(start=score_low, probability=0.0)])
    steps: list[Step] = []
    total = 0.0
    for cut, weight in mixture:
        total += weight
        steps.append(Step(start=cut, probability=min(1.0, total)))
    if steps[-1].probability > 1.0 - 1e-12:
        steps[-1] = Step(start=steps[-1].start, probability=1.0)
    return Rule(steps=steps)


def rule_for_point(hull: Hull, point: LpPoint, score_low: float) -> Rule:
    return rule_from_mixture(cut_mixture(hull, point), score_low)


def rule_from_weights(hull: Hull, weights: FloatArray, score_low: float) -> Rule:
    """The mixture of every hull vertex's cut with the LP's weights, as a rule.

    On any rows its expected counts are the weights times the counts at the vertex cuts,
    exactly: what a fallback unit needs, since its cost and capacity are counted on rows
    other than those its hull comes from.
    """
    mixture: dict[float, float] = {}
    for cut, w in zip(hull.cuts.tolist(), weights.tolist(), strict=True):
        # Never-act (cut inf) adds no step; weights below 1e-12 are LP rounding dust.
        if w > 1e-12 and np.isfinite(cut):
            mixture[cut] = mixture.get(cut, 0.0) + w
    return rule_from_mixture(sorted(mixture.items()), score_low)
