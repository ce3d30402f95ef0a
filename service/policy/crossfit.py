"""Cross-fitted promises: every calibration row judged by rules fitted without it.

The rows are split into K folds stratified by (group, outcome) (:func:`assign_folds`). For
each fold, the policy is derived with the same settings on the other K - 1 folds (every group
keeps the rule it uses in the full fit; a group left with one outcome class there falls back
as any one-class group does), and the fold-fitted rules' EXACT expected counts on the held-out
fold are summed per group: n, positives, E[TP] and E[FP], each a sum of P(action | score)
over held-out rows, with every row given the rule its group uses. Summed over folds these
are the group's out-of-sample counts; the promised rates are their ratios and the promised
cost per case is the mean of the per-row expected costs, c_FP p (y = 0) or c_FN (1 - p)
(y = 1), over all rows. Its 95% interval is the normal interval of that mean
(mean +- 1.96 sd / sqrt(N), sample sd of the per-row costs; common practice).

The deployed rules are still fitted on all rows; cross-fitting only says what to expect of
rules fitted this way on data they have not seen. Every fold reads its curves off the one
score order of the data (see :mod:`service.policy.units`), so no fold sorts again.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from service.policy.derive import CHECK_TOLERANCE, GAP_RATES, RATE_NAMES, Solution, solve
from service.policy.derive_lp import FOUR_FIFTHS
from service.policy.errors import InternalDeriveError
from service.policy.rates import ExpectedCounts, rule_bands
from service.policy.targets import CalibrationCounts, Criterion
from service.policy.units import (
    CalibrationData,
    DeriveError,
    FloatArray,
    IntpArray,
    Prepared,
    group_curves,
    prepare,
)
from service.stats.proportions import Z95

DEFAULT_FOLDS = 5
DEFAULT_FOLDS_SEED = 20261201


def assign_folds(data: CalibrationData, folds: int, seed: int) -> IntpArray:
    """The fold (0 .. folds - 1) of every row, stratified by (group, outcome).

    numpy's ``default_rng(seed)`` permutes the rows; the permuted rows are ordered by
    stratum (stably), and position i in that order goes to fold i mod K. Every stratum's
    rows are thus spread over the folds in random order, fold sizes within a stratum
    differing by at most one.
    """
    n = len(data.scores)
    if not 2 <= folds <= n:
        raise DeriveError(f"folds must be between 2 and the number of rows ({n})", "folds")
    rng = np.random.default_rng(seed)
    perm = rng.permutation(n)
    strata = data.group_codes.astype(np.int64) * 2 + data.outcomes.astype(np.int64)
    order = perm[np.argsort(strata[perm], kind="stable")]
    fold = np.empty(n, dtype=np.intp)
    fold[order] = np.arange(n, dtype=np.intp) % folds
    return fold


@dataclass(frozen=True)
class CrossFitted:
    """One criterion's out-of-sample counts per group (arrays indexed like group_keys)."""

    criterion: Criterion
    folds: int
    group_keys: list[str]
    n: npt.NDArray[np.int64]
    positives: npt.NDArray[np.int64]
    tp: FloatArray
    fp: FloatArray
    cost_sum: float
    cost_squares: float
    notes: list[str] = field(default_factory=list)

    @property
    def rows(self) -> int:
        return int(self.n.sum())

    def counts(self) -> ExpectedCounts:
        return ExpectedCounts(
            self.tp,
            self.fp,
            self.positives - self.tp,
            (self.n - self.positives) - self.fp,
        )

    def group_counts(self, key: str) -> CalibrationCounts:
        g = self.group_keys.index(key)
        return CalibrationCounts(
            n=int(self.n[g]),
            positives=int(self.positives[g]),
            tp=float(self.tp[g]),
            fp=float(self.fp[g]),
        )

    @property
    def cost_per_case(self) -> float:
        return self.cost_sum / self.rows

    def cost_interval(self) -> tuple[float, float]:
        """Normal 95% interval of the mean per-row expected cost (common practice)."""
        n = self.rows
        mean = self.cost_per_case
        if n < 2:
            return mean, mean
        variance = max(0.0, (self.cost_squares - n * mean * mean) / (n - 1))
        half = Z95 * math.sqrt(variance / n)
        return mean - half, mean + half

    @property
    def action_rate(self) -> float:
        """Overall share of rows acted on (the workload), out of sample."""
        return float((self.tp.sum() + self.fp.sum()) / self.rows)


def cross_fit(
    prepared: Prepared,
    criteria: Sequence[Criterion],
    folds: IntpArray,
    n_folds: int,
    tolerance: float,
    *,
    capacity: float | None = None,
    reference_group: str | None = None,
) -> dict[Criterion, CrossFitted | DeriveError]:
    """Out-of-sample counts of every criterion in ``criteria`` (or why it failed).

    A criterion that cannot be derived on some fold is reported as a :class:`DeriveError`;
    an :class:`InternalDeriveError` (a defect, not a property of the data) is raised again,
    naming the fold and the criterion.
    """
    data, settings = prepared.data, prepared.settings
    n_groups = len(data.group_keys)
    failed: dict[Criterion, DeriveError] = {}
    sums = {c: np.zeros((4, n_groups)) for c in criteria}  # n, positives, tp, fp
    costs = {c: [0.0, 0.0] for c in criteria}
    notes: list[str] = []
    for f in range(n_folds):
        held = folds == f
        where = f"cross-fitting fold {f + 1} of {n_folds}"
        try:
            fold = prepare(data, settings, fit=~held, assignment=prepared.rule_key_of)
        except DeriveError as exc:
            error = DeriveError(f"{where}, fitted on the other folds: {exc.message}", exc.field)
            return dict.fromkeys(criteria, error)
        notes += [f"{where}: {note}" for note in fold.notes]
        held_curves = group_curves(data, held)
        for criterion in criteria:
            if criterion in failed:
                continue
            try:
                sol = solve(
                    fold,
                    criterion,
                    tolerance,
                    capacity=capacity,
                    reference_group=reference_group,
                )
            except DeriveError as exc:
                failed[criterion] = DeriveError(f"{where}: {exc.message}", exc.field)
                continue
            except InternalDeriveError as exc:
                raise exc.within(f"{where} ({criterion.value})") from exc
            acc = sums[criterion]
            for g, (result, curve) in enumerate(zip(sol.groups, held_curves, strict=True)):
                bands = rule_bands(sol.rules[result.rule_key], curve)
                counts = bands.counts()
                acc[:, g] += (
                    curve.positives + curve.negatives,
                    curve.positives,
                    float(counts.tp[0]),
                    float(counts.fp[0]),
                )
                total, squares = bands.cost_sums(settings.cost_fp, settings.cost_fn)
                costs[criterion][0] += total
                costs[criterion][1] += squares
    out: dict[Criterion, CrossFitted | DeriveError] = {}
    for criterion in criteria:
        if criterion in failed:
            out[criterion] = failed[criterion]
            continue
        acc = sums[criterion]
        out[criterion] = CrossFitted(
            criterion,
            n_folds,
            list(data.group_keys),
            np.rint(acc[0]).astype(np.int64),
            np.rint(acc[1]).astype(np.int64),
            acc[2].copy(),
            acc[3].copy(),
            costs[criterion][0],
            costs[criterion][1],
            notes,
        )
    return out


def promise_warnings(
    cross: CrossFitted,
    tolerance: float,
    favourable: str,
    reference_group: str | None,
    outside: dict[str, str],
) -> list[str]:
    """Where the cross-fitted rates already miss the criterion (groups outside the promise
    aside): a gap beyond the tolerance, or a four-fifths ratio below 0.8."""
    counts = cross.counts()
    action = counts.action_rate
    rates = {
        "action_rate": action,
        "tpr": counts.tpr,
        "fpr": counts.fpr,
        "favourable": action if favourable == "action" else 1.0 - action,
    }
    keep = [g for g, k in enumerate(cross.group_keys) if k not in outside]
    warnings: list[str] = []
    tail = "this promise may not be kept out of sample"
    if cross.criterion in GAP_RATES:
        for name in GAP_RATES[cross.criterion]:
            values = {cross.group_keys[g]: float(rates[name][g]) for g in keep}
            values = {k: v for k, v in values.items() if not np.isnan(v)}
            if len(values) < 2:
                continue
            hi = max(values, key=lambda k: values[k])
            lo = min(values, key=lambda k: values[k])
            gap = values[hi] - values[lo]
            if gap > tolerance + CHECK_TOLERANCE:
                warnings.append(
                    f"cross-fitted {RATE_NAMES[name]} gap {gap:.3f} ({lo} {values[lo]:.3f}, "
                    f"{hi} {values[hi]:.3f}) exceeds the tolerance {tolerance:g}: {tail}"
                )
    elif cross.criterion is Criterion.FOUR_FIFTHS:
        fav = {cross.group_keys[g]: float(rates["favourable"][g]) for g in keep}
        fav = {k: v for k, v in fav.items() if not np.isnan(v)}
        comparator = (
            reference_group
            if reference_group is not None and reference_group in fav
            else max(fav, key=lambda k: fav[k], default=None)
        )
        if comparator is not None and fav[comparator] > 0:
            low = min(fav, key=lambda k: fav[k])
            ratio = fav[low] / fav[comparator]
            if ratio < FOUR_FIFTHS - CHECK_TOLERANCE:
                warnings.append(
                    f"cross-fitted favourable rate of {low} is {ratio:.3f} of {comparator}'s "
                    f"({fav[low]:.3f} vs {fav[comparator]:.3f}), below 0.8: {tail}"
                )
    return warnings


@dataclass(frozen=True)
class PriceRow:
    """One criterion in the price-of-parity table (None where it could not be derived)."""

    criterion: Criterion
    in_sample: Solution | None
    cross_fitted: CrossFitted | None
    note: str = ""


def compare(
    prepared: Prepared,
    tolerance: float,
    folds: IntpArray,
    n_folds: int,
    *,
    capacity: float | None = None,
    reference_group: str | None = None,
) -> list[PriceRow]:
    """Every criterion side by side, in sample and cross-fitted, under the same settings."""
    criteria = list(Criterion)
    cross = cross_fit(
        prepared,
        criteria,
        folds,
        n_folds,
        tolerance,
        capacity=capacity,
        reference_group=reference_group,
    )
    rows: list[PriceRow] = []
    for criterion in criteria:
        try:
            sol = solve(
                prepared,
                criterion,
                tolerance,
                capacity=capacity,
                reference_group=reference_group,
            )
        except DeriveError as exc:
            rows.append(PriceRow(criterion, None, None, exc.message))
            continue
        result = cross[criterion]
        if isinstance(result, DeriveError):
            rows.append(PriceRow(criterion, sol, None, result.message))
        else:
            rows.append(PriceRow(criterion, sol, result))
    return rows
