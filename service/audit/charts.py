"""What every chart across months shares: its state, its limit, its path.

A chart is ``S_0 = 0, S_t = max(0, S_{t-1} + W_t)`` over months (service.stats.cusum) and
signals at ``S_t >= h``. Each monthly audit recomputes it from zero over the latest
:data:`WINDOW` months. Its limit ``h`` is the smallest whose probability that a chart started
from zero signals falsely within :data:`DESIGN_HORIZON` months (``WINDOW + HORIZON``) is at most
the chart's share of the level, computed with the Markov chain of Brook & Evans (1972) on the
distribution of one in-control month's increment.

Why ``WINDOW + HORIZON`` and not one year: the windows of the twelve audits of any year of a
version's use lie within 36 consecutive months, and a windowed statistic at or above ``h`` means
a run of consecutive months within them whose increments sum to at least ``h``; that happens
exactly when a chart started from zero at the first of the 36 months reaches ``h`` within them
(Lindley: ``S_t`` is the largest sum of a run of months ending at ``t``). So with in-control
months alike, the chance of a false signal in any one year of use is at most the chance of one
within 36 months from zero, in the first year as in the tenth. A limit designed over 12 months
bounded the first year only: a chart that has run a year no longer sits at zero, and the charts
signalled falsely in about a quarter of second years (docs/error-rates.md).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from service.stats.cusum import (
    CONTROL_LIMIT_FLOOR,
    StepDistribution,
    coarsened,
    control_limit,
    cusum_path,
)

HORIZON = 12
"""Months of audits (a year of use) over which each version's false-signal probability is
bounded by the level, in every year."""
WINDOW = 24
"""Months of history the charts look back over (the latest snapshot of each)."""
DESIGN_HORIZON = WINDOW + HORIZON
"""Months of a chart's run from zero over which its limit bounds the false-signal probability:
every window of a year's audits lies within this many consecutive months."""
STATES = 60
"""Grid points of the Markov chain."""
STEP_POINTS = 201
"""Support points a month's increment distribution is coarsened to (mean kept exactly)."""
DISCRETISATION_MARGIN = 0.9
"""Limits are designed for 90% of their share of the level. With 60 states and 201 points the
false-signal probability of a limit, recomputed with a 200-state chain and 401 points, was
within 7% of its design in every case measured (tests/test_monitoring.py), so the margin keeps
every chart under its share."""
EDGE = 1e-4
"""Design probabilities are kept inside [EDGE, 1 - EDGE]."""


@dataclass(frozen=True, slots=True)
class ChartSide:
    side: str  # "above" or "below"
    in_control: float
    out_of_control: float
    """The gap (or ratio) the chart's in-control and out-of-control models assume."""
    limit: float
    path: tuple[float, ...]
    signal: bool
    first_signal: str | None

    @property
    def statistic(self) -> float:
        return self.path[-1] if self.path else 0.0


def clip(p: float) -> float:
    return min(1.0 - EDGE, max(EDGE, p))


def limit_for(step: StepDistribution, false_alarm: float) -> float:
    target = false_alarm * DISCRETISATION_MARGIN
    try:
        return control_limit([coarsened(step, STEP_POINTS)], DESIGN_HORIZON, target, STATES)
    except ValueError:
        # In control, no month's increment can be positive (a large volume: the evidence of
        # any one month is decisive). Any positive limit then meets the bound; the smallest
        # signals on the first month whose data favour the out-of-control model.
        return CONTROL_LIMIT_FLOOR


def chart_side(
    side: str,
    in_control: float,
    out_of_control: float,
    increments: Sequence[float],
    months: Sequence[str],
    limit: float,
) -> ChartSide:
    path = tuple(cusum_path(increments))
    first = next((m for m, v in zip(months, path, strict=True) if v >= limit), None)
    return ChartSide(side, in_control, out_of_control, limit, path, path[-1] >= limit, first)
