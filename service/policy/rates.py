"""Expected confusion counts and rates of a (possibly randomized) rule, computed exactly.

A rule gives every row a probability p_i of the action. The expected counts are sums of
those probabilities, never the result of sampling: E[TP] = sum of p_i over rows with y = 1,
E[FP] = sum of p_i over rows with y = 0, and E[FN], E[TN] their complements. All functions
are vectorised over rows and, in :func:`expected_counts_by_group`, over groups too.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

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


def expected_counts(probabilities: FloatArray, outcomes: npt.NDArray[np.integer]) -> ExpectedCounts:
    """Expected counts of one population (arrays of length 1)."""
    codes = np.zeros(len(probabilities), dtype=np.intp)
    return expected_counts_by_group(probabilities, outcomes, codes, 1)


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
    if len(p) and (np.any(p < 0.0) or np.any(p > 1.0) or not np.all(np.isfinite(p))):
        raise ValueError("probabilities must lie in [0, 1]")
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
