"""Empirical ROC curves and their upper convex hulls, vectorised and exact.

The ROC of a score over all distinct cuts (act iff score >= cut), plus never-act (0, 0) and
always-act (1, 1), comes from one sort and cumulative sums. Its upper convex hull is computed
on the integer counts, so every turn test is exact.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]


@dataclass(frozen=True)
class RocCurve:
    """Empirical ROC: point k acts on scores >= ``cuts[k]`` (``inf`` = never act).

    Counts are cumulative integers, so hull computations on them are exact.
    """

    cuts: FloatArray
    tp: IntArray
    fp: IntArray
    positives: int
    negatives: int

    @property
    def tpr(self) -> FloatArray:
        return self.tp / self.positives

    @property
    def fpr(self) -> FloatArray:
        return self.fp / self.negatives


def roc_curve(scores: FloatArray, outcomes: npt.NDArray[np.integer]) -> RocCurve:
    """ROC over all distinct cuts, from never (0, 0) down to the lowest score (1, 1)."""
    order = np.argsort(scores)[::-1]
    return roc_from_sorted(scores[order], outcomes[order])


def roc_from_sorted(scores: FloatArray, outcomes: npt.NDArray[np.integer]) -> RocCurve:
    """:func:`roc_curve` of rows already sorted by descending score (no sort: one pass).

    The order among equal scores does not matter: each run of ties closes one cut.
    """
    s = scores
    y = outcomes.astype(bool)
    tp = np.cumsum(y, dtype=np.int64)
    fp = np.cumsum(~y, dtype=np.int64)
    # The last row of each run of equal scores closes one cut.
    last = np.flatnonzero(np.append(s[1:] != s[:-1], True)) if len(s) else np.array([], int)
    zero = np.zeros(1, dtype=np.int64)
    return RocCurve(
        cuts=np.concatenate([[np.inf], s[last]]),
        tp=np.concatenate([zero, tp[last]]),
        fp=np.concatenate([zero, fp[last]]),
        positives=int(tp[-1]) if len(s) else 0,
        negatives=int(fp[-1]) if len(s) else 0,
    )


def counts_at(curve: RocCurve, cuts: npt.ArrayLike) -> tuple[IntArray, IntArray]:
    """(positives, negatives) scored at or above each cut, read off the curve exactly.

    ``curve.cuts`` falls from ``inf``; the count at a cut c is the curve's count at the
    lowest distinct score >= c (0 when no score reaches c).
    """
    c = np.asarray(cuts, dtype=np.float64)
    j = np.searchsorted(-curve.cuts, -c, side="right") - 1
    return curve.tp[j], curve.fp[j]


def upper_hull(curve: RocCurve) -> npt.NDArray[np.intp]:
    """Indices of the ROC points that are vertices of its upper convex hull, left to right.

    Vectorised pruning: every point on or below the chord of its current neighbours is not a
    vertex, so all of them go at once; repeat until every turn is strictly clockwise. Exact,
    because the coordinates are integer counts.
    """
    x, y = curve.fp, curve.tp
    idx = np.arange(len(x), dtype=np.intp)
    for _ in range(64):
        if len(idx) <= 2:
            return idx
        xi, yi = x[idx], y[idx]
        cross = (xi[1:-1] - xi[:-2]) * (yi[2:] - yi[:-2]) - (yi[1:-1] - yi[:-2]) * (
            xi[2:] - xi[:-2]
        )
        keep = cross < 0
        if keep.all():
            return idx
        idx = np.concatenate([idx[:1], idx[1:-1][keep], idx[-1:]])
    return _monotone_chain(x, y, idx)


def _monotone_chain(x: IntArray, y: IntArray, idx: npt.NDArray[np.intp]) -> npt.NDArray[np.intp]:
    """Andrew's monotone chain (upper half) for the rare inputs pruning does not settle."""
    out: list[int] = []
    for i in idx.tolist():
        while len(out) >= 2:
            o, a = out[-2], out[-1]
            if (x[a] - x[o]) * (y[i] - y[o]) - (y[a] - y[o]) * (x[i] - x[o]) >= 0:
                out.pop()
            else:
                break
        out.append(i)
    return np.asarray(out, dtype=np.intp)


@dataclass(frozen=True)
class Hull:
    """Upper hull vertices of one unit's ROC, from (0, 0) to (1, 1), with their cuts and the
    integer counts (``tp``, ``fp`` of ``positives``, ``negatives``) they come from."""

    fpr: FloatArray
    tpr: FloatArray
    cuts: FloatArray
    tp: IntArray
    fp: IntArray
    positives: int
    negatives: int

    @property
    def gain_numerators(self) -> IntArray:
        """TP N - FP P at each vertex: (TPR - FPR) x P N, an exact integer."""
        return self.tp * self.negatives - self.fp * self.positives

    @property
    def gain(self) -> FloatArray:
        """TPR - FPR at each vertex, as (TP N - FP P) / (P N).

        The numerators are exact integers over one common denominator, so vertices with
        equal gains (the two ends of a hull segment of slope 1) get the same float and a
        larger gain never gets a smaller one. ``tpr - fpr`` guarantees neither: its two
        roundings can leave the ends of a slope-1 segment one unit in the last place apart.
        """
        return self.gain_numerators / float(self.positives * self.negatives)


MAX_COUNT_PRODUCT = 2**62
"""Largest P x N the hull accepts: its gain numerators TP N - FP P must fit in int64."""


def hull_of(curve: RocCurve, score_low: float) -> Hull:
    if curve.positives * curve.negatives >= MAX_COUNT_PRODUCT:
        raise ValueError(
            f"{curve.positives} positives x {curve.negatives} negatives is too many rows "
            "for exact hull gains"
        )
    idx = upper_hull(curve)
    cuts = curve.cuts[idx].copy()
    # The last vertex acts on everyone: write it as the bottom of the score range so that
    # new scores below the calibration minimum are treated the same way.
    cuts[-1] = score_low
    return Hull(
        fpr=curve.fpr[idx],
        tpr=curve.tpr[idx],
        cuts=cuts,
        tp=curve.tp[idx],
        fp=curve.fp[idx],
        positives=curve.positives,
        negatives=curve.negatives,
    )
