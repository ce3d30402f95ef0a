"""Bootstrap standard errors of cross-fitted promises.

A cross-fitted promise (:mod:`service.policy.crossfit`) is not a binomial proportion of its
out-of-sample counts: the rules behind it are refitted on every fold, and where those rules
cut moves with the rows they see. So its spread around what it estimates is larger than
``sqrt(p (1 - p) / n)`` of its denominator (about twice for the largest groups' FPR and
action rate on the demo's data; docs/error-rates.md).

This module measures that spread by the nonparametric bootstrap (Efron & Tibshirani 1993, An
Introduction to the Bootstrap, ch. 6): each resample draws every group's rows with replacement
(group sizes kept, so every group keeps the rule it uses in the full fit), splits it into
folds afresh, runs the same cross-fitting and takes each group's promised rates; a rate's
standard error is the sample standard deviation of its values over the resamples.

A drawn row keeps the fold of the row it copies (the fresh split is made on the original
rows, stratified by group and outcome as :func:`assign_folds` does), so no row is ever both
fitted on and judged: copies of one row never straddle a fold boundary.

Resample ``b`` draws from ``numpy.random.default_rng([seed, b])``: the result depends on the
seed and the number of resamples only.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from service.policy.crossfit import CrossFitted, assign_folds, cross_fit
from service.policy.document import Criterion
from service.policy.errors import InternalDeriveError
from service.policy.units import DeriveError, FloatArray, IntpArray, Prepared, prepare

DEFAULT_RESAMPLES = 100
DEFAULT_RESAMPLES_SEED = 20261202
PROMISED_RATES = ("action_rate", "tpr", "fpr")
MIN_DEFINED = 2
"""A rate needs a value on at least this many resamples for a standard error."""


def promised_rates(cross: CrossFitted) -> dict[str, FloatArray]:
    """Each group's promised action rate, TPR and FPR (NaN where the denominator is 0):
    the ratios of its out-of-sample counts, as the policy document states them."""
    counts = cross.counts()
    return {
        "action_rate": np.asarray(counts.action_rate, dtype=np.float64),
        "tpr": np.asarray(counts.tpr, dtype=np.float64),
        "fpr": np.asarray(counts.fpr, dtype=np.float64),
    }


@dataclass(frozen=True)
class PromiseSpread:
    """The bootstrap's result: per group and rate a standard error (None: too few values)."""

    resamples: int
    used: int
    standard_errors: dict[str, dict[str, float | None]]
    failures: list[str]

    def of(self, group: str) -> dict[str, float | None]:
        return self.standard_errors[group]


def resample_rows(group_codes: IntpArray, n_groups: int, rng: np.random.Generator) -> IntpArray:
    """Row indices of one resample: each group's rows drawn with replacement, as many as it
    has, groups in code order."""
    order = np.argsort(group_codes, kind="stable")
    bounds = np.searchsorted(group_codes[order], np.arange(n_groups + 1), side="left")
    parts: list[IntpArray] = []
    for g in range(n_groups):
        rows = order[bounds[g] : bounds[g + 1]]
        if len(rows):
            parts.append(rows[rng.integers(0, len(rows), size=len(rows))])
    return np.concatenate(parts).astype(np.intp) if parts else np.zeros(0, dtype=np.intp)


Statistic = Callable[[IntpArray, np.random.Generator], "dict[str, FloatArray] | str"]
"""Rates per group (arrays indexed like the group keys, NaN where undefined) of one resample,
given its rows and its generator; or why it failed."""


def bootstrap_standard_errors(
    group_codes: IntpArray,
    group_keys: list[str],
    statistic: Statistic,
    names: tuple[str, ...],
    *,
    resamples: int,
    seed: int,
    progress: Callable[[int, int], None] | None = None,
) -> PromiseSpread:
    """The standard deviation over ``resamples`` within-group resamples of each of
    ``statistic``'s rates, per group (None where fewer than MIN_DEFINED values)."""
    if resamples < 2:
        raise DeriveError(f"resamples must be at least 2, got {resamples}", "resamples")
    n_groups = len(group_keys)
    values = {name: np.full((resamples, n_groups), np.nan) for name in names}
    ok = np.zeros(resamples, dtype=bool)
    failures: list[str] = []
    for b in range(resamples):
        rng = np.random.default_rng([seed, b])
        rows = resample_rows(group_codes, n_groups, rng)
        result = statistic(rows, rng)
        if isinstance(result, str):
            failures.append(f"resample {b + 1}: {result}")
        else:
            ok[b] = True
            for name in names:
                values[name][b] = result[name]
        if progress is not None:
            progress(b + 1, resamples)
    errors: dict[str, dict[str, float | None]] = {}
    for g, key in enumerate(group_keys):
        errors[key] = {}
        for name in names:
            column = values[name][ok, g]
            column = column[~np.isnan(column)]
            errors[key][name] = (
                float(np.std(column, ddof=1)) if len(column) >= MIN_DEFINED else None
            )
    return PromiseSpread(resamples, int(ok.sum()), errors, failures)


def bootstrap_errors(
    prepared: Prepared,
    criterion: Criterion,
    tolerance: float,
    n_folds: int,
    *,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = DEFAULT_RESAMPLES_SEED,
    capacity: float | None = None,
    reference_group: str | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> PromiseSpread:
    """Standard errors of every group's cross-fitted promised rates under ``criterion``.

    A resample on which the criterion cannot be cross-fitted (a :class:`DeriveError`, or an
    engine defect, :class:`InternalDeriveError`) is left out and its reason kept in
    ``failures``; the errors come from the resamples that succeeded.
    """
    data = prepared.data

    def cross_fitted(rows: IntpArray, rng: np.random.Generator) -> dict[str, FloatArray] | str:
        split = assign_folds(data, n_folds, int(rng.integers(0, 2**62)))
        try:
            fitted = prepare(data.subset(rows), prepared.settings, assignment=prepared.rule_key_of)
            result = cross_fit(
                fitted,
                [criterion],
                split[rows],
                n_folds,
                tolerance,
                capacity=capacity,
                reference_group=reference_group,
            )[criterion]
        except (DeriveError, InternalDeriveError) as exc:
            return str(exc)
        if isinstance(result, DeriveError):
            return result.message
        return promised_rates(result)

    return bootstrap_standard_errors(
        data.group_codes,
        list(data.group_keys),
        cross_fitted,
        PROMISED_RATES,
        resamples=resamples,
        seed=seed,
        progress=progress,
    )
