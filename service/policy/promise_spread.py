"""Bootstrap standard errors of cross-fitted promises.

A cross-fitted promise (:mod:`service.policy.crossfit`) is not a binomial proportion of its
out-of-sample counts: the rules behind it are refitted on every fold, and where those rules
cut moves with the rows they see. So its error, promise minus the true rate of the rule
actually served, spreads wider than ``sqrt(p (1 - p) / n)`` of its denominator
(docs/error-rates.md).

This module measures that error by the nonparametric bootstrap: each resample draws every
group's rows with replacement (group sizes kept, so every group keeps the rule it uses in
the full fit), splits it into folds afresh and runs the same cross-fitting, giving the
resample's promise ``p_b``. What the standard error describes is chosen by ``method``:

* ``"error"`` (the default, :data:`ERROR_METHOD`): the bootstrap of an estimation error
  (Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 10, on estimating bias and
  error by the bootstrap). The resample's rules are also fitted on all its rows, as the
  deployed rules are on the calibration data, and their "true" rate in the bootstrap world is
  their expected rate (with the rules' randomization) on ALL the original rows of the group,
  ``T_b``: the empirical distribution plays the population. The standard error is the sample
  standard deviation of ``p_b - T_b``. It leaves out the served rule's own movement from one
  calibration sample to another, which the promise and the truth of that rule share.
* ``"promise"`` (:data:`PROMISE_METHOD`, documents derived before the error bootstrap): the
  sample standard deviation of ``p_b`` itself; it counts that shared movement as error too,
  and overstated the error 1.7 to 2 times for the demo's largest groups' FPR and action
  rate (docs/error-rates.md).

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
from service.policy.derive import Solution, solve
from service.policy.errors import InternalDeriveError
from service.policy.rates import ExpectedCounts, rule_bands
from service.policy.targets import Criterion
from service.policy.units import (
    CalibrationData,
    DeriveError,
    FloatArray,
    IntpArray,
    Prepared,
    group_curves,
    prepare,
)

DEFAULT_RESAMPLES = 100
DEFAULT_RESAMPLES_SEED = 20261202
PROMISED_RATES = ("action_rate", "tpr", "fpr")
ERROR_METHOD = "error"
"""Standard deviation of the resampled promise minus its rules' rate on the original rows."""
PROMISE_METHOD = "promise"
"""Standard deviation of the resampled promise itself (the first estimator)."""
SPREAD_METHODS = (ERROR_METHOD, PROMISE_METHOD)
MIN_DEFINED = 2
"""A rate needs a value on at least this many resamples for a standard error."""


def promised_rates(cross: CrossFitted) -> dict[str, FloatArray]:
    """Each group's promised action rate, TPR and FPR (NaN where the denominator is 0):
    the ratios of its out-of-sample counts, as the policy document states them."""
    return rates_of(cross.counts())


def rates_of(counts: ExpectedCounts) -> dict[str, FloatArray]:
    """Action rate, TPR and FPR per group of expected counts (NaN where the denominator
    is 0)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return {
            "action_rate": np.asarray(counts.action_rate, dtype=np.float64),
            "tpr": np.asarray(counts.tpr, dtype=np.float64),
            "fpr": np.asarray(counts.fpr, dtype=np.float64),
        }


def served_rates(data: CalibrationData, solution: Solution) -> dict[str, FloatArray]:
    """Each group's expected action rate, TPR and FPR under ``solution``'s rules (each group
    the rule it uses there, randomization included) on all of ``data``'s rows."""
    n_groups = len(data.group_keys)
    tp, fp = np.zeros(n_groups), np.zeros(n_groups)
    positives, negatives = np.zeros(n_groups), np.zeros(n_groups)
    for g, (result, curve) in enumerate(zip(solution.groups, group_curves(data), strict=True)):
        counts = rule_bands(solution.rules[result.rule_key], curve).counts()
        tp[g], fp[g] = float(counts.tp[0]), float(counts.fp[0])
        positives[g], negatives[g] = curve.positives, curve.negatives
    return rates_of(ExpectedCounts(tp, fp, positives - tp, negatives - fp))


@dataclass(frozen=True)
class PromiseSpread:
    """The bootstrap's result: per group and rate a standard error (None: too few values)."""

    resamples: int
    used: int
    standard_errors: dict[str, dict[str, float | None]]
    failures: list[str]
    method: str = ERROR_METHOD

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


def bootstrap_spreads(
    prepared: Prepared,
    criterion: Criterion,
    tolerance: float,
    n_folds: int,
    *,
    methods: tuple[str, ...] = (ERROR_METHOD,),
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = DEFAULT_RESAMPLES_SEED,
    capacity: float | None = None,
    reference_group: str | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> dict[str, PromiseSpread]:
    """Standard errors of every group's cross-fitted promised rates under ``criterion`` by
    each of ``methods`` (:data:`SPREAD_METHODS`), all from the same resamples.

    A resample on which the criterion cannot be cross-fitted or fitted (a
    :class:`DeriveError`, or an engine defect, :class:`InternalDeriveError`) is left out and
    its reason kept in ``failures``; the errors come from the resamples that succeeded.
    """
    unknown = [m for m in methods if m not in SPREAD_METHODS]
    if unknown or not methods:
        raise DeriveError(f"spread methods must be among {SPREAD_METHODS}, got {methods}", "method")
    data = prepared.data
    want_error = ERROR_METHOD in methods

    def statistic(rows: IntpArray, rng: np.random.Generator) -> dict[str, FloatArray] | str:
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
            if isinstance(result, DeriveError):
                return result.message
            promise = promised_rates(result)
            out = {f"{PROMISE_METHOD}:{name}": promise[name] for name in PROMISED_RATES}
            if want_error:
                # The resample's served rules (fitted on all its rows) and their rates on the
                # original rows: the truth of those rules in the bootstrap world.
                served = solve(
                    fitted, criterion, tolerance, capacity=capacity, reference_group=reference_group
                )
                truth = served_rates(data, served)
                for name in PROMISED_RATES:
                    out[f"{ERROR_METHOD}:{name}"] = promise[name] - truth[name]
        except (DeriveError, InternalDeriveError) as exc:
            return str(exc)
        return out

    names = tuple(f"{m}:{name}" for m in methods for name in PROMISED_RATES)
    both = bootstrap_standard_errors(
        data.group_codes,
        list(data.group_keys),
        statistic,
        names,
        resamples=resamples,
        seed=seed,
        progress=progress,
    )
    return {
        m: PromiseSpread(
            both.resamples,
            both.used,
            {
                key: {name: errors[f"{m}:{name}"] for name in PROMISED_RATES}
                for key, errors in both.standard_errors.items()
            },
            both.failures,
            m,
        )
        for m in methods
    }


def bootstrap_errors(
    prepared: Prepared,
    criterion: Criterion,
    tolerance: float,
    n_folds: int,
    *,
    method: str = ERROR_METHOD,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = DEFAULT_RESAMPLES_SEED,
    capacity: float | None = None,
    reference_group: str | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> PromiseSpread:
    """Standard errors of every group's cross-fitted promised rates under ``criterion`` by
    ``method`` (the error bootstrap by default; see the module docstring)."""
    return bootstrap_spreads(
        prepared,
        criterion,
        tolerance,
        n_folds,
        methods=(method,),
        resamples=resamples,
        seed=seed,
        capacity=capacity,
        reference_group=reference_group,
        progress=progress,
    )[method]
