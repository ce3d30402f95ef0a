"""Expected confusion counts and rates of a (possibly randomized) rule, computed exactly.

A rule gives every row a probability p_i of the action. The expected counts are sums of
those probabilities, never the result of sampling: E[TP] = sum of p_i over rows with y = 1,
E[FP] = sum of p_i over rows with y = 0, and E[FN], E[TN] their complements. All functions
are vectorised over rows and, in :func:`expected_counts_by_group`, over groups too.
:func:`rule_bands` gets the same sums from a population's ROC curve instead of its rows: a
step rule is constant between its steps, so each sum is (probability of a band) x (rows
scored in that band), and the rows per band are differences of the curve's counts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from service.policy.document import Rule
from service.policy.roc import RocCurve, counts_at

FloatArray = npt.NDArray[np.float64]


def _ratio(num: FloatArray, den: FloatArray) -> FloatArray:
    """num / den, NaN where den is 0 (an undefined rate, not a zero one)."""
    out = np.full(np.shape(num), np.nan, dtype=np.float64)
    np.divide(num, den, out=out, where=den > 0)
    return out


@dataclass(frozen=True)
class ExpectedCounts:
    """Expected confusion counts, one entry per group (or a single entry)."""

    tp: FloatArray
    fp: FloatArray
    fn: FloatArray
    tn: FloatArray

    @property
    def positives(self) -> FloatArray:
        return self.tp + self.fn

    @property
    def negatives(self) -> FloatArray:
        return self.fp + self.tn

    @property
    def n(self) -> FloatArray:
        return self.positives + self.negatives

    @property
    def prevalence(self) -> FloatArray:
        return _ratio(self.positives, self.n)

    @property
    def tpr(self) -> FloatArray:
        return _ratio(self.tp, self.positives)

    @property
    def fpr(self) -> FloatArray:
        return _ratio(self.fp, self.negatives)

    @property
    def fnr(self) -> FloatArray:
        return _ratio(self.fn, self.positives)

    @property
    def tnr(self) -> FloatArray:
        return _ratio(self.tn, self.negatives)

    @property
    def action_rate(self) -> FloatArray:
        return _ratio(self.tp + self.fp, self.n)

    @property
    def ppv(self) -> FloatArray:
        """P(y = 1 | action); NaN when the rule never acts."""
        return _ratio(self.tp, self.tp + self.fp)

    @property
    def npv(self) -> FloatArray:
        """P(y = 0 | no action); NaN when the rule always acts."""
        return _ratio(self.tn, self.tn + self.fn)

    def cost_per_case(self, cost_fp: float, cost_fn: float) -> FloatArray:
        """(c_FP E[FP] + c_FN E[FN]) / N for each entry."""
        return _ratio(cost_fp * self.fp + cost_fn * self.fn, self.n)

    def total(self) -> ExpectedCounts:
        """All entries pooled into one."""
        return ExpectedCounts(
            np.array([self.tp.sum()]),
            np.array([self.fp.sum()]),
            np.array([self.fn.sum()]),
            np.array([self.tn.sum()]),
        )


def expected_counts(
    probabilities: FloatArray, outcomes: npt.NDArray[np.integer] | FloatArray
) -> ExpectedCounts:
    """Expected counts of one population (arrays of length 1)."""
    p = np.asarray(probabilities, dtype=np.float64)
    y = np.asarray(outcomes).astype(np.float64)
    if len(p) != len(y):
        raise ValueError("probabilities and outcomes must have the same length")
    _check_probabilities(p)
    positives = float(y.sum())
    tp = float(p @ y)
    fp = float(p.sum()) - tp

    def one(x: float) -> FloatArray:
        return np.array([x], dtype=np.float64)

    return ExpectedCounts(one(tp), one(fp), one(positives - tp), one(len(p) - positives - fp))


def _check_probabilities(p: FloatArray) -> None:
    if len(p) and not (np.all(np.isfinite(p)) and p.min() >= 0.0 and p.max() <= 1.0):
        raise ValueError("probabilities must lie in [0, 1]")


def expected_counts_by_group(
    probabilities: FloatArray,
    outcomes: npt.NDArray[np.integer] | npt.NDArray[np.bool_],
    group_codes: npt.NDArray[np.integer],
    n_groups: int,
) -> ExpectedCounts:
    """Expected counts per group; ``group_codes[i]`` in ``range(n_groups)`` names row i's group."""
    p = np.asarray(probabilities, dtype=np.float64)
    y = np.asarray(outcomes).astype(bool)
    codes = np.asarray(group_codes, dtype=np.intp)
    if not (len(p) == len(y) == len(codes)):
        raise ValueError("probabilities, outcomes and group_codes must have the same length")
    _check_probabilities(p)
    positives = _sum_by(codes, y.astype(np.float64), n_groups)
    negatives = _sum_by(codes, (~y).astype(np.float64), n_groups)
    tp = _sum_by(codes, np.where(y, p, 0.0), n_groups)
    fp = _sum_by(codes, np.where(y, 0.0, p), n_groups)
    return ExpectedCounts(tp=tp, fp=fp, fn=positives - tp, tn=negatives - fp)


def _sum_by(codes: npt.NDArray[np.intp], weights: FloatArray, n_groups: int) -> FloatArray:
    return np.bincount(codes, weights=weights, minlength=n_groups).astype(np.float64)


def chouldechova_fpr(prevalence: float, ppv: float, fnr: float) -> float:
    """FPR implied by prevalence, PPV and FNR within one group.

    Chouldechova 2017 (Big Data 5(2):153-163): FPR = p/(1-p) * (1-PPV)/PPV * (1-FNR). When
    two groups have equal PPV and FNR but different prevalence, their FPRs must differ:
    calibration-like parity and error-rate parity cannot both hold.
    """
    return prevalence / (1.0 - prevalence) * (1.0 - ppv) / ppv * (1.0 - fnr)


@dataclass(frozen=True)
class RuleBands:
    """A step rule on one population: per band of the rule (below the first step, then each
    step), the probability of the action and the positives and negatives scored there."""

    probability: FloatArray
    positives: FloatArray
    negatives: FloatArray

    def counts(self) -> ExpectedCounts:
        tp = float(self.probability @ self.positives)
        fp = float(self.probability @ self.negatives)

        def one(x: float) -> FloatArray:
            return np.array([x], dtype=np.float64)

        return ExpectedCounts(
            one(tp),
            one(fp),
            one(float(self.positives.sum()) - tp),
            one(float(self.negatives.sum()) - fp),
        )

    def cost_sums(self, cost_fp: float, cost_fn: float) -> tuple[float, float]:
        """Sum and sum of squares over rows of each row's expected cost, c_FP p (y = 0) or
        c_FN (1 - p) (y = 1): what a normal interval for the mean cost per case needs."""
        neg_cost = cost_fp * self.probability
        pos_cost = cost_fn * (1.0 - self.probability)
        total = float(neg_cost @ self.negatives + pos_cost @ self.positives)
        squares = float((neg_cost**2) @ self.negatives + (pos_cost**2) @ self.positives)
        return total, squares


def rule_bands(rule: Rule, curve: RocCurve) -> RuleBands:
    """The bands of ``rule`` on the population whose ROC is ``curve``, exactly."""
    starts = np.array([s.start for s in rule.steps], dtype=np.float64)
    tp_at, fp_at = counts_at(curve, starts)
    zero = np.zeros(1, dtype=np.int64)
    pos_above = np.concatenate([[curve.positives], tp_at, zero])
    neg_above = np.concatenate([[curve.negatives], fp_at, zero])
    return RuleBands(
        probability=np.array([0.0] + [s.probability for s in rule.steps], dtype=np.float64),
        positives=(pos_above[:-1] - pos_above[1:]).astype(np.float64),
        negatives=(neg_above[:-1] - neg_above[1:]).astype(np.float64),
    )
