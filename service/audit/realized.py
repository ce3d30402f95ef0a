"""Realized rates of one group from its counts, and what they can be compared with.

Everything here works on COUNTS (the audit job gets them from a GROUP BY in the database), never
on rows. A rate is a :class:`Rate`: the point estimate with its Wilson 95% interval, or a reason
why there is no number (nothing to divide by, or not identifiable under selective labels).

Selective labels: a policy document says after which decisions the outcome can be observed
(``outcome_observed_after``). When it is only after one of them, the rates conditioned on the
outcome (prevalence, TPR, FPR, FNR) and the predictive value on the other side are not
identifiable from the data at all, so they are reported as such rather than as numbers.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

from service.stats.calibration import PowerSums
from service.stats.proportions import newcombe_difference_interval, wilson_interval

Observability = Literal["both", "action", "no-action"]
Favourable = Literal["action", "no-action"]

RATE_METRICS: tuple[str, ...] = (
    "action_rate",
    "favourable_rate",
    "coverage",
    "prevalence",
    "tpr",
    "fpr",
    "fnr",
    "ppv",
    "npv",
    "override_rate",
)
"""Every rate a group row carries, in report order."""

GAP_METRICS: tuple[str, ...] = ("action_rate", "coverage", "tpr", "fpr", "ppv", "npv")
"""Rates whose gap to the reference group is reported with a Newcombe interval."""

_NEEDS_BOTH = frozenset({"prevalence", "tpr", "fpr", "fnr"})


@dataclass(frozen=True, slots=True)
class CellCounts:
    """Counts for one (version, group) cell of a month's cohort.

    ``tp``/``fp`` count recommended actions among rows with an observed outcome of 1/0; the
    other confusion counts follow from them. ``expected_fp`` and ``expected_fn`` are sums of
    P(action | score) over observed negatives and of 1 - P(action | score) over observed
    positives: the errors the randomized rule makes in expectation on the same rows.
    """

    n: int
    actions: int
    observed: int = 0
    positives: int = 0
    tp: int = 0
    fp: int = 0
    finals: int = 0
    overrides: int = 0
    expected_actions: float = 0.0
    expected_fp: float = 0.0
    expected_fn: float = 0.0

    def __post_init__(self) -> None:
        problems = []
        if not 0 <= self.actions <= self.n:
            problems.append("0 <= actions <= n")
        if not 0 <= self.observed <= self.n:
            problems.append("0 <= observed <= n")
        if not 0 <= self.positives <= self.observed:
            problems.append("0 <= positives <= observed")
        if not 0 <= self.tp <= self.positives:
            problems.append("0 <= tp <= positives")
        if not 0 <= self.fp <= self.observed - self.positives:
            problems.append("0 <= fp <= negatives")
        if not 0 <= self.overrides <= self.finals <= self.n:
            problems.append("0 <= overrides <= finals <= n")
        if problems:
            raise ValueError(f"inconsistent counts {self}: need " + ", ".join(problems))

    @property
    def no_actions(self) -> int:
        return self.n - self.actions

    @property
    def unobserved(self) -> int:
        return self.n - self.observed

    @property
    def negatives(self) -> int:
        return self.observed - self.positives

    @property
    def fn(self) -> int:
        return self.positives - self.tp

    @property
    def tn(self) -> int:
        return self.negatives - self.fp

    @property
    def observed_actions(self) -> int:
        return self.tp + self.fp

    @property
    def observed_no_actions(self) -> int:
        return self.fn + self.tn

    @property
    def followed(self) -> int:
        return self.finals - self.overrides

    def favourable(self, favourable: Favourable) -> int:
        return self.actions if favourable == "action" else self.no_actions

    def all_counts(self) -> dict[str, int]:
        """Every integer count of the cell by name, derived ones included."""
        return {
            "n": self.n,
            "actions": self.actions,
            "no_actions": self.no_actions,
            "observed": self.observed,
            "unobserved": self.unobserved,
            "positives": self.positives,
            "negatives": self.negatives,
            "tp": self.tp,
            "fp": self.fp,
            "fn": self.fn,
            "tn": self.tn,
            "observed_actions": self.observed_actions,
            "observed_no_actions": self.observed_no_actions,
            "finals": self.finals,
            "overrides": self.overrides,
            "followed": self.followed,
        }


RATE_FRACTIONS: dict[str, tuple[str, str]] = {
    "action_rate": ("actions", "n"),
    "coverage": ("observed", "n"),
    "prevalence": ("positives", "observed"),
    "tpr": ("tp", "positives"),
    "fpr": ("fp", "negatives"),
    "fnr": ("fn", "positives"),
    "ppv": ("tp", "observed_actions"),
    "npv": ("tn", "observed_no_actions"),
    "override_rate": ("overrides", "finals"),
}
"""Numerator and denominator count of each rate (favourable_rate depends on the policy)."""


def fraction_of(metric: str, favourable: Favourable) -> tuple[str, str]:
    if metric == "favourable_rate":
        return ("actions" if favourable == "action" else "no_actions", "n")
    return RATE_FRACTIONS[metric]


@dataclass(frozen=True, slots=True)
class Rate:
    """One rate: ``value`` with its Wilson 95% interval, or ``missing`` saying why not.

    ``missing`` is ``"no-cases"`` (denominator 0) or ``"not-identifiable"`` (selective labels).
    """

    numerator: int
    denominator: int
    value: float | None
    low: float | None
    high: float | None
    missing: str | None = None


def identifiable(metric: str, observed_after: Observability) -> bool:
    """Whether ``metric`` can be estimated when outcomes are seen only after ``observed_after``."""
    if observed_after == "both":
        return True
    if metric in _NEEDS_BOTH:
        return False
    if metric == "ppv":
        return observed_after == "action"
    if metric == "npv":
        return observed_after == "no-action"
    return True


def rate(
    metric: str, counts: CellCounts, favourable: Favourable, observed_after: Observability
) -> Rate:
    num_name, den_name = fraction_of(metric, favourable)
    values = counts.all_counts()
    k, n = values[num_name], values[den_name]
    if not identifiable(metric, observed_after):
        return Rate(k, n, None, None, None, "not-identifiable")
    if n == 0:
        return Rate(k, n, None, None, None, "no-cases")
    low, high = wilson_interval(k, n)
    return Rate(k, n, k / n, low, high)


def rates(
    counts: CellCounts, favourable: Favourable, observed_after: Observability
) -> dict[str, Rate]:
    return {m: rate(m, counts, favourable, observed_after) for m in RATE_METRICS}


@dataclass(frozen=True, slots=True)
class Gap:
    """rate(group) - rate(reference) with Newcombe's hybrid score interval."""

    value: float | None
    low: float | None
    high: float | None


def gap(group: Rate, reference: Rate) -> Gap:
    if group.value is None or reference.value is None or reference.missing or group.missing:
        return Gap(None, None, None)
    low, high = newcombe_difference_interval(
        group.numerator, group.denominator, reference.numerator, reference.denominator
    )
    return Gap(group.value - reference.value, low, high)


def four_fifths_flag(k_group: int, n_group: int, k_max: int, n_max: int) -> bool:
    """29 CFR 1607.4(D): flag iff k_g/n_g < (4/5) k_max/n_max, in exact integer arithmetic.

    Strictly less: a ratio of exactly 0.8 is not flagged (in floats (16/25)/(20/25) is
    0.7999999999999999, so the comparison is done as 5 k_g n_max < 4 k_max n_g).
    """
    if n_group <= 0 or n_max <= 0:
        return False
    return 5 * k_group * n_max < 4 * k_max * n_group


@dataclass(frozen=True, slots=True)
class CostPerCase:
    """Cost per observed case: realized (from the recommended actions), expected under the
    rule's probabilities on the same rows, and the one the version promised."""

    realized: float | None
    expected: float | None
    promised: float | None


def cost_per_case(
    counts: CellCounts,
    cost_fp: float,
    cost_fn: float,
    promised: float | None,
    observed_after: Observability,
) -> CostPerCase:
    if observed_after != "both" or counts.observed == 0:
        return CostPerCase(None, None, promised)
    realized = (cost_fp * counts.fp + cost_fn * counts.fn) / counts.observed
    expected = (cost_fp * counts.expected_fp + cost_fn * counts.expected_fn) / counts.observed
    return CostPerCase(realized, expected, promised)


@dataclass(frozen=True, slots=True)
class ShadowCounts:
    """What a shadow version would have done on the rows of one (active version, group) cell.

    ``n`` counts rows that carry a shadow decision; ``differs`` those where it would have
    decided otherwise than the active version; ``observed``, ``positives``, ``tp`` and ``fp``
    are as in :class:`CellCounts`, with the shadow's actions.
    """

    n: int
    actions: int
    differs: int
    observed: int = 0
    positives: int = 0
    tp: int = 0
    fp: int = 0

    def __post_init__(self) -> None:
        ok = (
            0 <= self.actions <= self.n
            and 0 <= self.differs <= self.n
            and 0 <= self.positives <= self.observed <= self.n
            and 0 <= self.tp <= self.positives
            and 0 <= self.fp <= self.observed - self.positives
        )
        if not ok:
            raise ValueError(f"inconsistent shadow counts {self}")

    def all_counts(self) -> dict[str, int]:
        negatives = self.observed - self.positives
        fn = self.positives - self.tp
        return {
            "n": self.n,
            "actions": self.actions,
            "no_actions": self.n - self.actions,
            "differs": self.differs,
            "agrees": self.n - self.differs,
            "observed": self.observed,
            "positives": self.positives,
            "negatives": negatives,
            "tp": self.tp,
            "fp": self.fp,
            "fn": fn,
            "tn": negatives - self.fp,
            "observed_actions": self.tp + self.fp,
            "observed_no_actions": fn + negatives - self.fp,
        }


SHADOW_RATE_FRACTIONS: dict[str, tuple[str, str]] = {
    "differ_rate": ("differs", "n"),
    "action_rate": ("actions", "n"),
    "tpr": ("tp", "positives"),
    "fpr": ("fp", "negatives"),
    "ppv": ("tp", "observed_actions"),
    "npv": ("tn", "observed_no_actions"),
}


def shadow_rates(counts: ShadowCounts, observed_after: Observability) -> dict[str, Rate]:
    values = counts.all_counts()
    out: dict[str, Rate] = {}
    for metric, (num_name, den_name) in SHADOW_RATE_FRACTIONS.items():
        k, n = values[num_name], values[den_name]
        if not identifiable(metric, observed_after):
            out[metric] = Rate(k, n, None, None, None, "not-identifiable")
        elif n == 0:
            out[metric] = Rate(k, n, None, None, None, "no-cases")
        else:
            low, high = wilson_interval(k, n)
            out[metric] = Rate(k, n, k / n, low, high)
    return out


BINS = 10
"""Equal-width score bins over [0, 1] of the reliability table."""


@dataclass
class ScoreSums:
    """Sums over one (version, group)'s cases with an outcome and a score in [0, 1]."""

    power: PowerSums = field(default_factory=PowerSums)
    log_double: float = 0.0
    """sum of ln(1 + s): the risk-adjusted chart's term for an odds ratio of 2."""
    log_half: float = 0.0
    """sum of ln(1 - s / 2): the term for an odds ratio of 1/2."""
    bin_counts: list[int] = field(default_factory=lambda: [0] * BINS)
    bin_positives: list[int] = field(default_factory=lambda: [0] * BINS)
    bin_score_sums: list[float] = field(default_factory=lambda: [0.0] * BINS)
